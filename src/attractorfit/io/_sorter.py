"""Spike-sorter output folders: spike sample indices, cluster ids, cluster labels.

Layout read: ``spike_times.npy`` (sample index of each spike), ``spike_clusters.npy``
(cluster of each spike; ``spike_templates.npy`` when clusters are absent),
``params.py`` (sampling rate; parsed, never executed), and optionally
``cluster_info.tsv`` / ``cluster_group.tsv`` (a label such as good / mua / noise per
cluster).
"""

from __future__ import annotations

import ast
import os

import numpy as np

from attractorfit._validation import check_positive
from attractorfit.errors import InputError
from attractorfit.io._common import (check_file, check_text_size, finish, load_npy,
                                     provenance_of, resolve_trials, source_name)
from attractorfit.io._table import _find_column, _header, _rows
from attractorfit.recording import Recording

__all__ = ["read_sorter_folder"]

_RATE_KEYS = ("sample_rate", "sampling_rate")
#: Label files in increasing priority: a later file overrides an earlier one.
_LABEL_FILES = ("cluster_info.tsv", "cluster_group.tsv")
_LABEL_COLUMNS = ("group", "KSLabel", "label")
#: Largest params.py read (a settings file of a few lines; anything bigger is refused).
PARAMS_MAX_BYTES = 1 << 20


def _read_params(path) -> tuple[dict, dict]:
    """Simple assignments ``name = literal`` of a Python settings file, never executed.

    Parameters
    ----------
    path : str or path-like
        e.g. ``params.py`` with lines such as ``sample_rate = 30000.0``.

    Returns
    -------
    values : dict
        Name to value for every assignment whose value is a Python literal; other
        statements are skipped.
    lines : dict
        Name to the line number of its (last) assignment.

    Raises
    ------
    InputError
        The file is larger than :data:`PARAMS_MAX_BYTES` or not valid Python text.
    """
    name = source_name(path)
    size = os.path.getsize(path)
    if size > PARAMS_MAX_BYTES:
        raise InputError(f"{name}: {size} bytes; expected a small settings file (at most "
                         f"{PARAMS_MAX_BYTES} bytes) with assignments such as "
                         "'sample_rate = 30000.0'")
    try:
        with open(path, "rb") as fh:
            text = fh.read()
        tree = ast.parse(text, filename=name)
    except SyntaxError as exc:
        if exc.lineno is None:  # e.g. NUL bytes: not text at all
            raise InputError(f"{name}: not a Python text file ({exc.msg}); expected "
                             "assignments such as 'sample_rate = 30000.0'") from None
        raise InputError(f"{name} line {exc.lineno}: not valid Python syntax ({exc.msg}); "
                         "expected assignments such as 'sample_rate = 30000.0'") from None
    except (ValueError, UnicodeDecodeError, RecursionError, MemoryError) as exc:
        # NUL bytes, bad encoding, absurd nesting
        raise InputError(f"{name}: not a Python text file ({exc}); expected assignments "
                         "such as 'sample_rate = 30000.0'") from None
    values, lines = {}, {}
    for node in tree.body:
        if (isinstance(node, ast.Assign) and len(node.targets) == 1
                and isinstance(node.targets[0], ast.Name)):
            try:
                value = ast.literal_eval(node.value)
            except (ValueError, TypeError, SyntaxError, MemoryError, RecursionError):
                continue
            values[node.targets[0].id] = value
            lines[node.targets[0].id] = node.lineno
    return values, lines


def _vector(path, what) -> np.ndarray:
    where = f"{source_name(os.path.dirname(path))}/{os.path.basename(path)}"
    arr = load_npy(path, where)
    if arr.ndim == 2 and 1 in arr.shape:
        arr = arr.ravel()
    if arr.ndim != 1:
        raise InputError(f"{where}: shape {arr.shape}; expected a 1-dimensional array of "
                         f"{what}")
    return arr


def _cluster_labels(folder, used: list, warnings: list) -> dict:
    labels: dict = {}
    for fname in _LABEL_FILES:
        path = os.path.join(folder, fname)
        if not os.path.isfile(path):
            continue
        used.append(path)
        if os.path.getsize(path) == 0:
            warnings.append(f"{fname}: empty file ignored")
            continue
        check_text_size(path, fname)
        rows = _rows(path, "\t")
        hline, header = _header(path, rows, what="columns 'cluster_id' and a label "
                                                 "column such as 'group'")
        i_id = _find_column(header, "cluster_id", path=path, line=hline,
                            option="cluster_id", aliases=("id",))
        label_cols = [header.index(c) for c in _LABEL_COLUMNS if c in header]
        if not label_cols:
            raise InputError(f"{fname} line {hline}: no label column in the header "
                             f"({', '.join(map(repr, header[:12]))}); expected one of "
                             f"{list(_LABEL_COLUMNS)}")
        for line, fields in rows:
            if len(fields) != len(header):
                raise InputError(f"{fname} line {line}: {len(fields)} field(s), expected "
                                 f"{len(header)} like the header (tab-separated)")
            try:
                cid = int(fields[i_id])
            except ValueError:
                raise InputError(f"{fname} line {line}: cluster_id {fields[i_id]!r} is not "
                                 "a whole number") from None
            # first non-empty label column wins (manual 'group' before automatic ones)
            label = next((fields[k] for k in label_cols if fields[k]), "")
            if label:
                labels[str(cid)] = label.lower()
    return labels


def read_sorter_folder(path, *, sampling_rate=None, good_only: bool = False,
                       trials=None, time_unit: str = "s",
                       trials_time_unit: str | None = None) -> Recording:
    """Read a spike-sorter output folder.

    Parameters
    ----------
    path : str or path-like
        Folder with ``spike_times.npy`` (sample indices) and ``spike_clusters.npy``
        (or ``spike_templates.npy``), ``params.py`` with ``sample_rate = ...`` unless
        ``sampling_rate`` is given, and optionally ``cluster_info.tsv`` and
        ``cluster_group.tsv`` (tab-separated, columns ``cluster_id`` and ``group``,
        ``KSLabel`` or ``label``; ``cluster_group.tsv`` takes precedence).
    sampling_rate : float, optional
        Samples per second; overrides ``params.py`` (with a warning if they differ).
    good_only : bool
        Keep only clusters labelled ``good``.
    trials : str or path-like, optional
        A trials table (see :func:`read_trials_table`); a folder has none of its own.
    time_unit : {'s', 'ms'}
        Unit of the trials table's times.
    trials_time_unit : {'s', 'ms'}, optional
        Unit of the ``trials`` table when it differs from ``time_unit``.

    Returns
    -------
    Recording
        Unit ids are cluster ids; ``metadata['cluster_labels']`` maps id to label,
        and the same labels (lower case, "" when a cluster has none) are the unit
        metadata column ``group`` when the folder has label files.

    Raises
    ------
    InputError
        Missing or malformed files, arrays of different lengths, negative or
        non-finite sample indices, no sampling rate, no good units when
        ``good_only``, fewer than two units, no spikes.

    Notes
    -----
    ``params.py`` is parsed with :func:`ast.parse` and only literal assignments are
    evaluated (:func:`ast.literal_eval`); the file is never executed.
    """
    folder = check_file(path, folder=True)
    name = source_name(folder)
    warnings: list = []
    used: list = []
    st_path = os.path.join(folder, "spike_times.npy")
    check_file(st_path)
    used.append(st_path)
    cl_path = os.path.join(folder, "spike_clusters.npy")
    if not os.path.isfile(cl_path):
        cl_path = os.path.join(folder, "spike_templates.npy")
        if not os.path.isfile(cl_path):
            raise InputError(f"{name}: no spike_clusters.npy or spike_templates.npy; "
                             "expected the cluster (or template) of each spike")
        warnings.append(f"{name}: no spike_clusters.npy; units are the sorter's templates "
                        "(spike_templates.npy), not curated clusters")
    check_file(cl_path)
    used.append(cl_path)

    rate = None
    params_path = os.path.join(folder, "params.py")
    if os.path.isfile(params_path):
        used.append(params_path)
        params, lines = _read_params(params_path)
        key = next((k for k in _RATE_KEYS if k in params), None)
        if key is not None:
            value = params[key]
            line = lines[key]
            try:
                rate = check_positive(key, value)
            except InputError:
                raise InputError(f"params.py line {line}: {key} {value!r} is not a positive "
                                 "number of samples per second") from None
    if sampling_rate is not None:
        given = check_positive("sampling_rate", sampling_rate)
        if rate is not None and not np.isclose(rate, given, rtol=1e-9):
            warnings.append(f"{name}: sampling_rate={given:g} overrides params.py "
                            f"sample_rate = {rate:g}")
        rate = given
    if rate is None:
        raise InputError(f"{name}: no sampling rate (no params.py with 'sample_rate = ...'); "
                         "expected the option sampling_rate= in samples per second")

    samples = _vector(st_path, "spike sample indices")
    clusters = _vector(cl_path, "cluster ids")
    where = f"{name}/{os.path.basename(cl_path)}"
    if samples.dtype.kind not in "iuf":
        raise InputError(f"{name}/spike_times.npy: dtype {samples.dtype}; expected sample "
                         "indices (whole numbers)")
    if clusters.dtype.kind not in "iu":
        raise InputError(f"{where}: dtype {clusters.dtype}; expected whole-number cluster "
                         "ids")
    if samples.size != clusters.size:
        raise InputError(f"{name}: spike_times.npy has {samples.size} spikes but "
                         f"{os.path.basename(cl_path)} has {clusters.size}; expected one "
                         "cluster per spike")
    times = samples.astype(np.float64)
    bad = ~np.isfinite(times) | (times < 0)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise InputError(f"{name}/spike_times.npy: element {i} is {samples[i].item()!r}; expected "
                         "sample indices >= 0")
    times /= rate

    labels = _cluster_labels(folder, used, warnings)
    ids = np.unique(clusters)
    if good_only:
        if not labels:
            raise InputError(f"{name}: good_only=True but the folder has no cluster labels "
                             f"({' or '.join(_LABEL_FILES)}); expected labels such as 'good'")
        keep_ids = np.array([c for c in ids if labels.get(str(c)) == "good"],
                            dtype=clusters.dtype)
        if keep_ids.size < 2:
            raise InputError(f"{name}: good_only=True keeps {keep_ids.size} of {ids.size} "
                             "clusters (labelled 'good'); expected at least 2 units")
        keep = np.isin(clusters, keep_ids)
        times, clusters, ids = times[keep], clusters[keep], keep_ids
    else:
        noise = [c for c in ids if labels.get(str(c)) == "noise"]
        if noise:
            warnings.append(f"{name}: {len(noise)} cluster(s) labelled 'noise' were kept "
                            f"(first: {noise[0]}); use good_only=True to keep only 'good'")
    metadata = {"format": "sorter_folder", "sampling_rate": rate,
                "cluster_labels": {str(c): labels.get(str(c), "") for c in ids}}
    provenance = provenance_of(used)
    trials_table = resolve_trials(None, trials, source=name, time_unit=time_unit,
                                  trials_time_unit=trials_time_unit,
                                  provenance=provenance, warnings=warnings)
    info = {"group": np.array([labels.get(str(c), "") for c in ids], dtype=str)} \
        if labels else {}
    rec = Recording.from_arrays(times, clusters, trials=trials_table,
                                unit_ids=[str(c) for c in ids], metadata=metadata,
                                provenance=provenance, source=name, unit_info=info)
    return finish(rec, warnings)
