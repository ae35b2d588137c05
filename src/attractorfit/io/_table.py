"""Plain-text tables: spike tables (one row per spike), trials tables, and the CSV writer."""

from __future__ import annotations

import csv
import io
import math
import os
import re

import numpy as np

from attractorfit._output import atomic_write
from attractorfit._validation import check_trials, warn_input
from attractorfit.errors import InputError
from attractorfit.io._common import (check_file, check_text_size, finish, provenance_of,
                                     resolve_trials, source_name, time_factor)
from attractorfit.recording import Recording

__all__ = ["read_table", "read_trials_table", "write_csv"]

_DELIMITER_BY_SUFFIX = {".csv": ",", ".tsv": "\t", ".tab": "\t"}
_SNIFF_DELIMITERS = ",\t;| "
_UNIT_WORDS = {1.0: "seconds", 1e-3: "milliseconds"}
_INT_RE = re.compile(r"[+-]?\d+\Z")
_FLOAT_RE = re.compile(r"[+-]?(\d+\.?\d*([eE][+-]?\d+)?|\.\d+([eE][+-]?\d+)?"
                       r"|nan|inf|infinity)\Z", re.IGNORECASE)
_BOOL_WORDS = {"true": True, "false": False}


# ------------------------------------------------------------------ reading rows
def _delimiter(path, delimiter) -> str:
    """The field delimiter: given, else from the suffix, else sniffed from the header."""
    name = source_name(path)
    if delimiter is not None:
        if not isinstance(delimiter, str) or len(delimiter) != 1 or delimiter in "\"\r\n":
            raise InputError(f"delimiter: expected one character such as ',' or '\\t', "
                             f"got {delimiter!r}")
        return delimiter
    suffix = os.path.splitext(path)[1].lower()
    if suffix in _DELIMITER_BY_SUFFIX:
        return _DELIMITER_BY_SUFFIX[suffix]
    with open(path, "rb") as fh:
        raw = fh.read(65536)
    try:
        sample = raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        if exc.start < len(raw) - 3:  # a multi-byte character may be cut at the end
            raise InputError(f"{name}: the file is not UTF-8 text (byte {exc.start}); "
                             "expected a text table with a header row") from None
        sample = raw[:exc.start].decode("utf-8-sig", errors="ignore")
    first = next((ln for ln in sample.splitlines() if ln.strip()), "")
    try:
        found = csv.Sniffer().sniff(sample, delimiters=_SNIFF_DELIMITERS).delimiter
    except csv.Error:
        found = None
    if found is None or found not in first:
        counts = {d: first.count(d) for d in ",\t;|"}
        best = max(counts, key=counts.get)
        found = best if counts[best] else " "
    return found


def _rows(path, delimiter):
    """Yield ``(line_number, fields)`` of every non-blank row (the header first).

    Fields are stripped of surrounding spaces. Lines are decoded one at a time so
    that decoding and CSV syntax errors become InputError naming the line.
    """
    name = source_name(path)
    physical = [0]

    def lines(fh):
        for k, raw in enumerate(fh, start=1):
            physical[0] = k
            text = raw.decode("utf-8")
            yield text[1:] if k == 1 and text.startswith("\ufeff") else text

    reader = None
    try:
        with open(path, "rb") as fh:
            reader = csv.reader(lines(fh), delimiter=delimiter,
                                skipinitialspace=delimiter == " ", strict=True)
            for row in reader:
                fields = [f.strip() for f in row]
                if delimiter == " ":
                    fields = [f for f in fields if f]
                if any(fields):
                    yield reader.line_num, fields
    except UnicodeDecodeError:
        raise InputError(f"{name} line {physical[0]}: the file is not UTF-8 text; expected "
                         "a text table with a header row") from None
    except csv.Error as exc:
        raise InputError(f"{name} line {physical[0]}: not a readable table row ({exc})"
                         ) from None


def _header(path, rows, *, what: str):
    name = source_name(path)
    try:
        line, header = next(rows)
    except StopIteration:
        raise InputError(f"{name}: no header row; expected {what}") from None
    seen = set()
    for col in header:
        if col in seen:
            raise InputError(f"{name} line {line}: column {col!r} appears twice in the "
                             "header; expected unique column names")
        seen.add(col)
    return line, header


def _find_column(header, wanted: str, *, path, line: int, option: str,
                 aliases=()) -> int:
    """Index of column ``wanted`` (exact, then case-insensitive, then aliases)."""
    if not isinstance(wanted, str) or not wanted:
        raise InputError(f"{option}: expected a column name, got {wanted!r}")
    for candidate in (wanted, *aliases):
        if candidate in header:
            return header.index(candidate)
        folded = [i for i, h in enumerate(header) if h.lower() == candidate.lower()]
        if len(folded) == 1:
            return folded[0]
    shown = ", ".join(repr(h) for h in header[:12]) + (" ..." if len(header) > 12 else "")
    hint = ""
    if len(header) == 1 and any(d in header[0] for d in ",\t;| "):
        hint = "; the header has a single field: check the delimiter (option delimiter=)"
    raise InputError(f"{source_name(path)} line {line}: no column {wanted!r} in the header "
                     f"({shown}); expected a {wanted!r} column (set its name with "
                     f"{option}=){hint}")


def _check_width(path, line, fields, header, delimiter):
    if len(fields) != len(header):
        raise InputError(f"{source_name(path)} line {line}: {len(fields)} field(s), "
                         f"expected {len(header)} like the header (delimiter "
                         f"{delimiter!r})")


def _parse_times(texts, lines, *, path, what: str, factor: float) -> np.ndarray:
    """Parse time strings into float64 seconds; errors name the line and the value."""
    name = source_name(path)
    unit_word = _UNIT_WORDS.get(factor, "seconds")
    try:
        values = np.fromiter(map(float, texts), dtype=np.float64, count=len(texts))
    except (ValueError, OverflowError):
        for text, line in zip(texts, lines):
            try:
                float(text)
            except (ValueError, OverflowError):
                raise InputError(f"{name} line {line}: {what} {text!r} is not a number of "
                                 f"{unit_word}") from None
        raise  # pragma: no cover -- the loop above always finds the bad value
    bad = ~np.isfinite(values)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise InputError(f"{name} line {lines[i]}: {what} {texts[i]!r} is not a finite "
                         f"number of {unit_word}")
    neg = values < 0
    if neg.any():
        i = int(np.flatnonzero(neg)[0])
        raise InputError(f"{name} line {lines[i]}: {what} {texts[i]!r} is negative; "
                         f"expected {unit_word} >= 0")
    return values * factor if factor != 1.0 else values


def _typed_column(values: list) -> np.ndarray:
    """A label column: bool, int64 or float64 when every cell fits, else text."""
    if values and all(v.lower() in _BOOL_WORDS for v in values):
        return np.array([_BOOL_WORDS[v.lower()] for v in values], dtype=bool)
    if values and all(_INT_RE.match(v) for v in values):
        ints = [int(v) for v in values]
        if all(-(2 ** 63) <= i < 2 ** 63 for i in ints):
            return np.array(ints, dtype=np.int64)
    if any(values) and all(v == "" or _FLOAT_RE.match(v) for v in values):
        return np.array([float(v) if v else math.nan for v in values], dtype=np.float64)
    return np.array(values, dtype=str)


# ------------------------------------------------------------------ public readers
def read_trials_table(path, *, time_unit: str = "s", start_column: str = "start",
                      stop_column: str = "stop", delimiter: str | None = None) -> dict:
    """Read a trials table (CSV/TSV with a header) into columns.

    Parameters
    ----------
    path : str or path-like
        The table: one row per trial, a header row naming the columns.
    time_unit : {'s', 'ms'}
        Unit of the start and stop columns.
    start_column, stop_column : str
        Names of the trial start and stop columns (``start_time``/``stop_time`` are
        accepted when the defaults are absent).
    delimiter : str, optional
        Field delimiter; default from the suffix (``.csv`` comma, ``.tsv``/``.tab``
        tab) or sniffed from the file.

    Returns
    -------
    dict of str to ndarray
        ``start`` and ``stop`` in seconds (float64) and every other column as a label
        column, rows sorted by start. A label column is boolean when every cell is
        true/false, int64 or float64 when every cell is a number (empty cells of a
        numeric column become NaN), and text otherwise.

    Raises
    ------
    InputError
        Missing, empty or unreadable file, missing start/stop column, rows of the
        wrong width, times that are not finite numbers >= 0, stop <= start,
        overlapping trials. Messages name the file and line.
    """
    path = check_file(path)
    name = source_name(path)
    factor = time_factor(time_unit)
    check_text_size(path, name)
    delim = _delimiter(path, delimiter)
    rows = _rows(path, delim)
    hline, header = _header(path, rows, what="a trials table with columns 'start' and "
                                              "'stop'")
    i_start = _find_column(header, start_column, path=path, line=hline,
                           option="start_column", aliases=("start_time",))
    i_stop = _find_column(header, stop_column, path=path, line=hline,
                          option="stop_column", aliases=("stop_time",))
    cols = [[] for _ in header]
    lines = []
    for line, fields in rows:
        _check_width(path, line, fields, header, delim)
        lines.append(line)
        for c, f in zip(cols, fields):
            c.append(f)
    if not lines:
        raise InputError(f"{name}: the trials table has a header but no rows; expected "
                         "one row per trial")
    start = _parse_times(cols[i_start], lines, path=path, what="start", factor=factor)
    stop = _parse_times(cols[i_stop], lines, path=path, what="stop", factor=factor)
    start, stop, order = check_trials(start, stop, source=name,
                                      row_labels=[f"line {n}" for n in lines])
    out = {"start": start, "stop": stop}
    for k, col in enumerate(header):
        if k in (i_start, i_stop):
            continue
        label = col if col else f"column_{k + 1}"
        if label in out:
            raise InputError(f"{name} line {hline}: label column {label!r} clashes with "
                             "the trial start/stop columns; expected distinct names")
        out[label] = _typed_column(cols[k])[order]
    return out


def read_table(path, *, unit_column: str = "unit", time_column: str = "time",
               time_unit: str = "s", delimiter: str | None = None,
               trials=None, trials_time_unit: str | None = None) -> Recording:
    """Read a spike table: one row per spike, a unit column and a time column.

    Parameters
    ----------
    path : str or path-like
        CSV, TSV or other delimited text with a header row; extra columns are ignored.
    unit_column, time_column : str
        Header names of the unit label and spike time columns.
    time_unit : {'s', 'ms'}
        Unit of the time column (and of the trials table, if given).
    trials_time_unit : {'s', 'ms'}, optional
        Unit of the ``trials`` table when it differs from ``time_unit``.
    delimiter : str, optional
        Field delimiter; default from the suffix (``.csv`` comma, ``.tsv``/``.tab``
        tab) or sniffed from the first lines (``.txt`` and others).
    trials : str or path-like, optional
        A trials table for :func:`read_trials_table`.

    Returns
    -------
    Recording
        Units sorted by label (numerically when every label is an integer).

    Raises
    ------
    InputError
        Missing, empty or unreadable file, a file too large to parse in the memory
        available (checked before reading), missing columns, rows of the wrong width,
        empty unit labels, spike times that are not finite numbers >= 0, fewer than
        two units, no spikes. Messages name the file and the line.
    """
    path = check_file(path)
    name = source_name(path)
    factor = time_factor(time_unit)
    check_text_size(path, name)
    delim = _delimiter(path, delimiter)
    rows = _rows(path, delim)
    hline, header = _header(path, rows, what=f"a spike table with columns "
                                             f"{unit_column!r} and {time_column!r}")
    i_unit = _find_column(header, unit_column, path=path, line=hline, option="unit_column")
    i_time = _find_column(header, time_column, path=path, line=hline, option="time_column")
    if i_unit == i_time:
        raise InputError(f"unit_column and time_column: both name column "
                         f"{header[i_unit]!r}; expected two different columns")
    units, texts, lines = [], [], []
    for line, fields in rows:
        _check_width(path, line, fields, header, delim)
        if not fields[i_unit]:
            raise InputError(f"{name} line {line}: empty unit label in column "
                             f"{header[i_unit]!r}; expected a unit id on every row")
        units.append(fields[i_unit])
        texts.append(fields[i_time])
        lines.append(line)
    if not lines:
        raise InputError(f"{name}: the spike table has a header but no rows; expected "
                         "one row per spike")
    times = _parse_times(texts, lines, path=path, what="spike time", factor=factor)
    warnings: list = []
    provenance = provenance_of([path])
    trials_table = resolve_trials(None, trials, source=name, time_unit=time_unit,
                                  trials_time_unit=trials_time_unit,
                                  provenance=provenance, warnings=warnings)
    rec = Recording.from_arrays(times, np.array(units, dtype=str), trials=trials_table,
                                metadata={"format": "table", "time_unit": time_unit},
                                provenance=provenance, source=name)
    return finish(rec, warnings)


# ------------------------------------------------------------------ writer
def _cell(value) -> str:
    if isinstance(value, (bool, np.bool_)):
        return "True" if value else "False"
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    if isinstance(value, (float, np.floating)):
        return repr(float(value))  # shortest text that reads back to the same float
    return str(value)


def write_csv(recording: Recording, spikes_path, trials_path=None) -> None:
    """Write a recording as a spike table (``unit,time``) and optionally a trials table.

    Times are written in seconds with the shortest text that reads back to the
    same float, so :func:`read_table` returns an equal recording. Both files are
    written atomically (temporary name in the same folder, then renamed).

    Parameters
    ----------
    recording : Recording
    spikes_path : str or path-like
        Destination of the spike table, one row per spike in time order.
    trials_path : str or path-like, optional
        Destination of the trials table (``start,stop`` then the label columns).

    Raises
    ------
    InputError
        ``trials_path`` given for a recording without trials.

    Notes
    -----
    A spike table cannot hold a unit without spikes: such units are left out, with
    an :class:`~attractorfit.errors.InputWarning`. Text labels that look like
    numbers read back as numbers.
    """
    silent = [u for u, t in zip(recording.unit_ids, recording.spike_times) if len(t) == 0]
    if silent:
        warn_input(f"write_csv: {len(silent)} unit(s) without spikes cannot be written to "
                   f"a spike table and were left out (first: {silent[0]!r})")
    if trials_path is not None and recording.trials is None:
        raise InputError("trials_path: the recording has no trials table to write")
    times = np.concatenate([np.asarray(t, dtype=np.float64) for t in recording.spike_times]
                           or [np.zeros(0)])
    codes = np.concatenate([np.full(len(t), k, dtype=np.int64)
                            for k, t in enumerate(recording.spike_times)] or
                           [np.zeros(0, dtype=np.int64)])
    order = np.argsort(times, kind="stable")
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["unit", "time"])
    ids = [str(u) for u in recording.unit_ids]
    w.writerows([ids[c], repr(t)] for c, t in zip(codes[order].tolist(),
                                                   times[order].tolist()))
    atomic_write(spikes_path, buf.getvalue())
    if trials_path is not None:
        cols = ["start", "stop"] + recording.label_columns
        buf = io.StringIO()
        w = csv.writer(buf, lineterminator="\n")
        w.writerow(cols)
        arrays = [np.asarray(recording.trials[c]).ravel() for c in cols]
        for i in range(recording.n_trials):
            w.writerow([_cell(a[i]) for a in arrays])
        atomic_write(trials_path, buf.getvalue())
