"""NWB files through pynwb: units table, trials table (epochs as a fallback), writer."""

from __future__ import annotations

import datetime
import hashlib
import os
import tempfile

import numpy as np

from attractorfit.errors import InputError
from attractorfit.io._common import (check_claimed_size, check_file, finish,
                                     hdf5_preflight, library_errors, provenance_of,
                                     resolve_trials, source_name)
from attractorfit.recording import Recording, _natural_sort

__all__ = ["read_nwb", "write_nwb"]

#: Units-table columns tried, in order, for unit names when ``unit_column`` is not given.
NAME_COLUMNS = ("unit_name", "name", "unit_id", "cluster_id")
#: Trials-table columns NWB defines itself; a label column may not use these names.
_RESERVED_TRIAL_COLUMNS = ("start_time", "stop_time", "tags", "timeseries", "id")
#: Units-table columns NWB defines itself (with ``unit_name``, ours); a unit metadata
#: column may not use these names when written.
_RESERVED_UNIT_COLUMNS = ("spike_times", "obs_intervals", "electrodes", "electrode_group",
                          "waveform_mean", "waveform_sd", "waveforms", "id", "unit_name")
_EPOCH = datetime.datetime(1970, 1, 1, tzinfo=datetime.timezone.utc)
_EXPECTED = "an NWB file (HDF5 written by pynwb or another NWB writer)"


def _text(values) -> np.ndarray | None:
    """Object/bytes values as a text array, or None if they are not all text."""
    out = []
    for v in values:
        if isinstance(v, bytes):
            try:
                v = v.decode("utf-8")
            except UnicodeDecodeError:
                return None
        if not isinstance(v, str):
            return None
        out.append(v)
    return np.array(out, dtype=str)


def _find_units(nwb, name: str, warnings: list):
    from pynwb.misc import Units

    if nwb.units is not None:
        return nwb.units
    others = [obj for obj in nwb.objects.values() if isinstance(obj, Units)]
    if not others:
        raise InputError(f"{name}: the NWB file has no units table; expected sorted units "
                         "with spike times (NWBFile.units)")
    warnings.append(f"{name}: no units table at the top level; used the units table "
                    f"{others[0].name!r} found in {others[0].parent.name!r}")
    return others[0]


def _read_units(units, name: str, unit_column, warnings: list):
    from hdmf.common.table import VectorIndex

    if "spike_times" not in units.colnames:
        raise InputError(f"{name}: the units table has no 'spike_times' column (columns: "
                         f"{list(units.colnames)}); expected spike times per unit")
    col = units["spike_times"]
    if not isinstance(col, VectorIndex):
        raise InputError(f"{name}: the units table's 'spike_times' column is not indexed "
                         "per unit; expected a ragged column (spike_times + "
                         "spike_times_index)")
    check_claimed_size(f"{name}: units spike_times", col.target.data.shape,
                       np.dtype(col.target.data.dtype).itemsize)
    check_claimed_size(f"{name}: units spike_times_index", col.data.shape, 8)
    ends = np.asarray(col.data[:], dtype=np.int64).ravel()
    flat = np.asarray(col.target.data[:], dtype=np.float64).ravel()
    if ends.size and (np.any(np.diff(ends) < 0) or ends[0] < 0 or ends[-1] != flat.size):
        raise InputError(f"{name}: the units table's spike_times_index is inconsistent "
                         f"with its {flat.size} spike times; expected a valid NWB file")
    trains = np.split(flat, ends[:-1]) if ends.size else []
    ids = [str(i) for i in np.asarray(units.id.data[:]).ravel()]  # hdmf checked lengths
    chosen = unit_column
    if chosen is None:
        chosen = next((c for c in NAME_COLUMNS if c in units.colnames), None)
    elif chosen not in units.colnames:
        raise InputError(f"unit_column: the units table of {name} has no column "
                         f"{chosen!r} (columns: {list(units.colnames)}); expected the column "
                         "holding unit names")
    if chosen is not None:
        column = units[chosen]
        names = None if isinstance(column, VectorIndex) else np.asarray(column.data[:])
        if names is not None and names.ndim == 1:
            names = _text(names.tolist()) if names.dtype.kind in "OS" else names.astype(str)
        if names is None or names.ndim != 1 or len(names) != len(ids):
            if unit_column is not None:
                raise InputError(f"unit_column: column {chosen!r} of {name}'s units table "
                                 "does not hold one name per unit")
            warnings.append(f"{name}: units column {chosen!r} does not hold one name per "
                            "unit; used the table ids as unit ids")
        elif unit_column is None and (len(set(names.tolist())) != len(names)
                                      or "" in names.tolist()):
            warnings.append(f"{name}: units column {chosen!r} has repeated or empty names; "
                            "used the table ids as unit ids")
        else:
            ids = names.tolist()
    check_claimed_size(f"{name}: units table", (len(ids), max(len(units.colnames), 1)), 64,
                       what=f"{len(ids)} units of {len(units.colnames)} columns")
    info, skipped = _unit_columns(units, len(ids), exclude=(chosen, "spike_times"))
    if skipped:
        warnings.append(f"{name}: units column(s) {skipped} are not one number or text per "
                        "unit; left out of the unit metadata")
    return ids, trains, info


def _unit_columns(units, n: int, *, exclude) -> tuple:
    """One-value-per-unit columns of a units table (text or numbers) and those skipped.

    Ragged columns (spike times, observation intervals, waveforms), table references
    (electrodes) and multi-dimensional columns (mean waveforms) are skipped without a
    word when NWB defines them, with a warning otherwise.
    """
    from hdmf.common.table import DynamicTableRegion, VectorIndex

    info, skipped = {}, []
    for col in units.colnames:
        if col in exclude:
            continue
        column = units[col]
        values = None
        shape = getattr(getattr(column, "data", None), "shape", None)
        if (not isinstance(column, (VectorIndex, DynamicTableRegion))
                and shape is not None and tuple(shape) == (n,)):  # read only 1-D columns
            values = np.asarray(column.data[:])
            if values.dtype.kind in "OS":
                values = _text(values.tolist())
            elif values.dtype.kind not in "biuf":
                values = None
        if values is None:
            if col not in _RESERVED_UNIT_COLUMNS:
                skipped.append(col)
            continue
        info[col] = values
    return info, skipped


def _interval_columns(table, name: str, warnings: list) -> dict | None:
    """Columns of an NWB TimeIntervals table as a trials dict (None if it is empty)."""
    from hdmf.common.table import DynamicTableRegion, VectorIndex

    n = len(table.id.data)
    if n == 0:
        warnings.append(f"{name}: the {table.name} table is empty; ignored")
        return None
    check_claimed_size(f"{name}: {table.name} table", (n, max(len(table.colnames), 2)), 8,
                       what=f"{n} rows of {len(table.colnames)} columns")
    out = {"start": np.asarray(table["start_time"].data[:], dtype=np.float64),
           "stop": np.asarray(table["stop_time"].data[:], dtype=np.float64)}
    skipped = []
    for col in table.colnames:
        if col in ("start_time", "stop_time"):
            continue
        column = table[col]
        label = col if col not in ("start", "stop") else f"{col}_label"
        if isinstance(column, VectorIndex):
            if col == "tags":
                rows = [",".join(_text(list(r)).tolist()) if _text(list(r)) is not None
                        else "" for r in column[:]]
                if any(rows):
                    out[label] = np.array(rows, dtype=str)
                continue
            skipped.append(col)
            continue
        if isinstance(column, DynamicTableRegion):
            skipped.append(col)
            continue
        values = np.asarray(column.data[:])
        if values.ndim != 1 or len(values) != n:
            skipped.append(col)
            continue
        if values.dtype.kind in "OS":
            values = _text(values.tolist())
            if values is None:
                skipped.append(col)
                continue
        elif values.dtype.kind not in "biuf":
            skipped.append(col)
            continue
        out[label] = values
    if skipped:
        warnings.append(f"{name}: {table.name} column(s) {skipped} are not one number or "
                        "text per trial; left out of the trial labels")
    return out


def read_nwb(path, *, unit_column: str | None = None, trials=None,
             time_unit: str = "s", trials_time_unit: str | None = None) -> Recording:
    """Read units and trials from an NWB file with pynwb (read-only).

    Parameters
    ----------
    path : str or path-like
        The ``.nwb`` file.
    unit_column : str, optional
        Units-table column holding the unit names. Default: the first of
        ``unit_name``, ``name``, ``unit_id``, ``cluster_id`` present, else the table ids.
    trials : str or path-like, optional
        A trials table (see :func:`read_trials_table`) that replaces the file's.
    time_unit : {'s', 'ms'}
        Unit of the times in the ``trials`` table (NWB times are always seconds).
    trials_time_unit : {'s', 'ms'}, optional
        Unit of the ``trials`` table when it differs from ``time_unit``.

    Returns
    -------
    Recording
        Units in the order of their ids (numerical when all are integers), as every
        reader returns them; every units-table column holding one number or text per
        unit (e.g. a single/multi-unit type, a site) in ``unit_info``. Trials from the
        file's trials table with every
        one-value-per-trial column as a label; without a trials table, the epochs
        table (its tags joined by commas).

    Raises
    ------
    InputError
        Not a readable NWB file (missing, empty, truncated, not HDF5, or so corrupt
        that reading it crashes the HDF5 library, which is tried first in a child
        process), no units table
        or no spike times, a ``unit_column`` that is absent, bad times or trials, fewer
        than two units, no spikes.

    References
    ----------
    .. [1] Rübel O, Tritt A, Ly R, Dichter BK, Ghosh S, Niu L, et al. (2022). The
       Neurodata Without Borders ecosystem for neurophysiological data science.
       eLife 11:e78362.
    """
    path = check_file(path)
    name = source_name(path)
    warnings: list = []
    from pynwb import NWBHDF5IO

    hdf5_preflight(path)  # a corrupt file can crash the HDF5 library: try it in a child
    with library_errors(path, _EXPECTED):
        nwb_io = NWBHDF5IO(path, mode="r")
    try:
        with library_errors(path, _EXPECTED):
            nwb = nwb_io.read()
            units = _find_units(nwb, name, warnings)
            ids, trains, unit_info = _read_units(units, name, unit_column, warnings)
            file_trials = None
            if nwb.trials is not None:
                file_trials = _interval_columns(nwb.trials, name, warnings)
            if file_trials is None and nwb.epochs is not None:
                file_trials = _interval_columns(nwb.epochs, name, warnings)
                if file_trials is not None and trials is None:
                    warnings.append(f"{name}: no trials table; used the "
                                    f"{len(file_trials['start'])} epochs as trials")
            metadata = {"format": "nwb", "session_description": nwb.session_description,
                        "identifier": nwb.identifier,
                        "session_start_time": nwb.session_start_time.isoformat()
                        if nwb.session_start_time is not None else None}
            if nwb.subject is not None and nwb.subject.subject_id is not None:
                metadata["subject_id"] = nwb.subject.subject_id
    finally:
        with library_errors(path, _EXPECTED):
            nwb_io.close()
    provenance = provenance_of([path])
    trials_table = resolve_trials(file_trials, trials, source=name, time_unit=time_unit,
                                  trials_time_unit=trials_time_unit,
                                  provenance=provenance, warnings=warnings)
    order = {u: k for k, u in enumerate(ids)}
    ids = _natural_sort(ids) if len(set(ids)) == len(ids) else ids  # same order as others
    trains = [trains[order[u]] for u in ids]
    rows = np.array([order[u] for u in ids], dtype=np.int64)
    rec = Recording(unit_ids=ids, spike_times=trains, trials=trials_table,
                    metadata=metadata, provenance=provenance,
                    unit_info={c: v[rows] for c, v in unit_info.items()})
    rec.metadata["source"] = name
    return finish(rec.validate(), warnings)


# ------------------------------------------------------------------ writer
def _content_id(recording: Recording) -> str:
    """A deterministic identifier from the recording's content (same data, same id)."""
    h = hashlib.sha256()
    for uid, t in zip(recording.unit_ids, recording.spike_times):
        h.update(str(uid).encode() + b"\0")
        h.update(np.ascontiguousarray(t, dtype=np.float64).tobytes())
    if recording.trials is not None:
        for c in recording.trials:
            h.update(str(c).encode() + b"\0")
            h.update(np.asarray(recording.trials[c]).astype(str).tobytes())
    for c, v in recording.unit_info.items():  # nothing added without unit metadata
        h.update(b"unit column " + str(c).encode() + b"\0")
        h.update(np.asarray(v).astype(str).tobytes())
    return h.hexdigest()[:32]


def _trial_value(v):
    if isinstance(v, (str, np.str_)):
        return str(v)
    if isinstance(v, np.bool_):
        return bool(v)
    return v


def _units_table(recording: Recording):
    """The units table built from whole columns (row by row, hdmf converts every spike
    time on its own: 23 s for 1.4 million spikes against well under a second)."""
    from hdmf.common import VectorData, VectorIndex
    from pynwb.misc import Units

    times = [np.asarray(t, dtype=np.float64) for t in recording.spike_times]
    flat = np.concatenate(times) if times else np.zeros(0)
    ends = np.cumsum([t.size for t in times]).astype(np.int64)
    spikes = VectorData(name="spike_times", description="the spike times for each unit in "
                        "seconds", data=flat)
    index = VectorIndex(name="spike_times_index", data=ends, target=spikes)
    names = VectorData(name="unit_name", description="unit id",
                       data=[str(u) for u in recording.unit_ids])
    info = [VectorData(name=c, description=f"unit metadata {c}",
                       data=[_trial_value(x) for x in np.asarray(v).ravel()])
            for c, v in recording.unit_info.items()]
    return Units(name="units", id=np.arange(recording.n_units),
                 columns=[spikes, index, names, *info], description="units")


def write_nwb(recording: Recording, path, *, session_description: str | None = None) -> None:
    """Write a recording as an NWB file: units table (spike times, unit names) and trials.

    Parameters
    ----------
    recording : Recording
    path : str or path-like
        Destination ``.nwb`` file; written to a temporary name in the same folder and
        renamed, so a reader never sees a partial file.
    session_description : str, optional
        Default: ``metadata['session_description']`` or a generic text.

    Raises
    ------
    InputError
        A trial label column named like an NWB trials column (start_time,
        stop_time, tags, timeseries, id), or a label column whose values are
        neither numbers, booleans nor text; a unit metadata column named like an
        NWB units column (spike_times, electrodes, waveforms...).

    Notes
    -----
    Unit ids go to a ``unit_name`` column and ``unit_info`` columns to units-table
    columns; label columns become trials-table columns.
    To keep files reproducible, the identifier is a hash of the content and the
    session start (also used as the file creation date) is
    ``metadata['session_start_time']`` or 1970-01-01T00:00:00Z when unknown.
    """
    from pynwb import NWBFile, NWBHDF5IO

    path = os.fspath(path)
    labels = recording.label_columns
    for c in labels:
        if c in _RESERVED_TRIAL_COLUMNS:
            raise InputError(f"write_nwb: trial label column {c!r} has a name NWB reserves "
                             f"({', '.join(_RESERVED_TRIAL_COLUMNS)}); rename it first")
        kind = np.asarray(recording.trials[c]).dtype.kind
        if kind not in "biufUS":
            raise InputError(f"write_nwb: trial label column {c!r} has dtype "
                             f"{np.asarray(recording.trials[c]).dtype}; expected numbers, "
                             "booleans or text")
    for c in recording.unit_info:
        if c in _RESERVED_UNIT_COLUMNS:
            raise InputError(f"write_nwb: unit metadata column {c!r} has a name the NWB "
                             f"units table reserves ({', '.join(_RESERVED_UNIT_COLUMNS)}); "
                             "rename it first")
    meta = recording.metadata
    start = _EPOCH
    if meta.get("session_start_time"):
        try:
            start = datetime.datetime.fromisoformat(str(meta["session_start_time"]))
        except ValueError:
            start = _EPOCH
        if start.tzinfo is None:
            start = start.replace(tzinfo=datetime.timezone.utc)
    nwb = NWBFile(session_description=session_description
                  or str(meta.get("session_description") or "spike trains written by "
                                                             "attractorfit"),
                  identifier=_content_id(recording), session_start_time=start,
                  file_create_date=start)
    nwb.units = _units_table(recording)
    if recording.trials is not None and recording.n_trials:
        for c in labels:
            nwb.add_trial_column(name=c, description=f"trial label {c}")
        cols = {c: np.asarray(recording.trials[c]).ravel() for c in labels}
        for i in range(recording.n_trials):
            nwb.add_trial(start_time=float(recording.trials["start"][i]),
                          stop_time=float(recording.trials["stop"][i]),
                          **{c: _trial_value(cols[c][i]) for c in labels})
    folder = os.path.dirname(os.path.abspath(path))
    os.makedirs(folder, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix="." + os.path.basename(path) + ".", suffix=".part.nwb",
                               dir=folder)
    os.close(fd)
    try:
        with NWBHDF5IO(tmp, mode="w") as io:
            io.write(nwb)
        mask = os.umask(0)
        os.umask(mask)
        os.chmod(tmp, 0o666 & ~mask)  # the permissions a plain open() would give
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        raise
