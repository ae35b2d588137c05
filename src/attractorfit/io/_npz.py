"""NPZ archives: ``spike_times`` + ``spike_units`` [+ ``trial_start``, ``trial_stop``,
``trial_<label>``, ``unit_ids``]. Never unpickled; array sizes checked before reading."""

from __future__ import annotations

import zipfile

import numpy as np

from attractorfit._validation import check_array
from attractorfit.errors import InputError
from attractorfit.io._common import (check_file, finish, library_errors, provenance_of,
                                     read_npy_header, resolve_trials, source_name,
                                     time_factor)
from attractorfit.recording import Recording

__all__ = ["read_npz"]

_KNOWN = {"spike_times", "spike_units", "trial_start", "trial_stop", "unit_ids"}


def _read_members(path) -> dict:
    """Every array of the archive, each header checked before its data is read."""
    name = source_name(path)
    arrays = {}
    with library_errors(path, "an NPZ archive (zip of .npy arrays)"):
        zf = zipfile.ZipFile(path, "r")
    with zf:
        members = zf.infolist()
        if not members:
            raise InputError(f"{name}: the archive holds no arrays; expected 'spike_times' "
                             "and 'spike_units'")
        for info in members:
            key = info.filename[:-4] if info.filename.endswith(".npy") else info.filename
            where = f"{name}: array {key!r}"
            if key in arrays:
                raise InputError(f"{where} appears twice in the archive; expected unique "
                                 "array names")
            with library_errors(path, f"an NPZ archive (member {info.filename!r})"):
                with zf.open(info) as fh:
                    read_npy_header(fh, where)  # refuses objects and absurd sizes
                with zf.open(info) as fh:
                    arr = np.lib.format.read_array(fh, allow_pickle=False)
            arrays[key] = arr
    return arrays


def _vector(arrays, key, where):
    arr = arrays[key]
    if arr.ndim == 2 and 1 in arr.shape:
        arr = arr.ravel()
    if arr.ndim != 1:
        raise InputError(f"{where}: array {key!r} has shape {arr.shape}; expected a "
                         "1-dimensional array")
    return arr


def _times(arrays, key, where, factor, what):
    arr = _vector(arrays, key, where)
    if arr.dtype.kind not in "iuf":
        raise InputError(f"{where}: array {key!r} has dtype {arr.dtype}; expected real "
                         f"numbers ({what})")
    arr = check_array(f"{where}: array {key!r}", arr, ndim=1)
    if arr.size and arr.min() < 0:
        i = int(np.argmin(arr))
        raise InputError(f"{where}: array {key!r} element {i} is {arr[i].item()!r}; expected "
                         f"{what} >= 0")
    return arr * factor if factor != 1.0 else arr


def _labels(arr, key, where) -> np.ndarray:
    """Unit labels as text: integers, text, or whole-valued floats."""
    if arr.dtype.kind in "iub":
        return arr.astype(np.int64).astype(str) if arr.dtype.kind == "b" else arr.astype(str)
    if arr.dtype.kind == "U":
        return arr
    if arr.dtype.kind == "S":
        try:
            return np.char.decode(arr, "utf-8")
        except UnicodeDecodeError:
            raise InputError(f"{where}: array {key!r} holds bytes that are not UTF-8 "
                             "text; expected unit labels") from None
    if arr.dtype.kind == "f":
        wide = arr.astype(np.float64)
        whole = np.isfinite(wide) & (wide == np.round(wide)) & (np.abs(wide) < 2 ** 53)
        if not whole.all():
            i = int(np.flatnonzero(~whole)[0])
            raise InputError(f"{where}: array {key!r} element {i} is {arr[i].item()!r}; expected "
                             "unit labels (whole numbers or text)")
        return wide.astype(np.int64).astype(str)
    raise InputError(f"{where}: array {key!r} has dtype {arr.dtype}; expected unit labels "
                     "(whole numbers or text)")


def read_npz(path, *, time_unit: str = "s", trials=None,
             trials_time_unit: str | None = None) -> Recording:
    """Read spikes (and optionally trials) from an NPZ archive.

    Parameters
    ----------
    path : str or path-like
        Archive with 1-D arrays ``spike_times`` (numbers) and ``spike_units`` (unit
        label of each spike: integers or text), optionally ``unit_ids`` (all units in
        order, including silent ones), ``trial_start`` and ``trial_stop`` (together)
        and ``trial_<label>`` arrays (one value per trial) as label columns.
    time_unit : {'s', 'ms'}
        Unit of the spike and trial times (and of the trials table, if given).
    trials_time_unit : {'s', 'ms'}, optional
        Unit of the ``trials`` table when it differs from ``time_unit``.
    trials : str or path-like, optional
        A trials table (see :func:`read_trials_table`) that replaces the archive's.

    Returns
    -------
    Recording

    Raises
    ------
    InputError
        Not a zip of ``.npy`` arrays, arrays of Python objects (never unpickled),
        arrays claiming more memory than is available, missing or mismatched arrays,
        non-finite or negative times, bad trials, fewer than two units, no spikes.
    """
    path = check_file(path)
    name = source_name(path)
    factor = time_factor(time_unit)
    arrays = _read_members(path)
    missing = [k for k in ("spike_times", "spike_units") if k not in arrays]
    if missing:
        raise InputError(f"{name}: no array(s) {missing} in the archive (found "
                         f"{sorted(arrays)[:10]}); expected 'spike_times' and 'spike_units'")
    times = _times(arrays, "spike_times", name, factor, "spike times")
    units = _labels(_vector(arrays, "spike_units", name), "spike_units", name)
    if units.size != times.size:
        raise InputError(f"{name}: {times.size} spike_times but {units.size} spike_units; "
                         "expected one unit label per spike")
    unit_ids = None
    if "unit_ids" in arrays:
        unit_ids = _labels(_vector(arrays, "unit_ids", name), "unit_ids", name).tolist()
        known = set(unit_ids)
        stray = [u for u in np.unique(units).tolist() if u not in known]
        if stray:
            raise InputError(f"{name}: spike_units has label {stray[0]!r} that is not in "
                             "unit_ids; expected every spike's unit among unit_ids")
    warnings: list = []
    file_trials = None
    has = [k for k in ("trial_start", "trial_stop") if k in arrays]
    if len(has) == 1:
        raise InputError(f"{name}: the archive has {has[0]!r} without "
                         f"{({'trial_start', 'trial_stop'} - set(has)).pop()!r}; expected "
                         "both or neither")
    if has:
        file_trials = {"start": _times(arrays, "trial_start", name, factor, "trial times"),
                       "stop": _times(arrays, "trial_stop", name, factor, "trial times")}
        for key in sorted(arrays):
            if key.startswith("trial_") and key not in ("trial_start", "trial_stop"):
                col = _vector(arrays, key, name)
                if col.dtype.kind not in "biufUS":
                    raise InputError(f"{name}: array {key!r} has dtype {col.dtype}; "
                                     "expected numbers or text trial labels")
                if col.dtype.kind == "S":
                    col = _labels(col, key, name)
                file_trials[key[len("trial_"):]] = col
    stray_trial = [k for k in arrays if k.startswith("trial_") and not has]
    if stray_trial:
        warnings.append(f"{name}: array(s) {stray_trial} ignored: trial labels need "
                        "'trial_start' and 'trial_stop'")
    unknown = sorted(k for k in arrays if k not in _KNOWN and not k.startswith("trial_"))
    if unknown:
        warnings.append(f"{name}: array(s) {unknown} ignored; expected spike_times, "
                        "spike_units, unit_ids and trial_* arrays")
    provenance = provenance_of([path])
    trials_table = resolve_trials(file_trials, trials, source=name, time_unit=time_unit,
                                  trials_time_unit=trials_time_unit,
                                  provenance=provenance, warnings=warnings)
    rec = Recording.from_arrays(times, units, trials=trials_table, unit_ids=unit_ids,
                                metadata={"format": "npz", "time_unit": time_unit},
                                provenance=provenance, source=name)
    return finish(rec, warnings)
