"""Helpers shared by the readers: file checks, library-error wrapping, size limits,
``.npy`` headers, tracking of the files a library reads, and the final assembly of a
:class:`~attractorfit.recording.Recording` (trials override, loader warnings).
"""

from __future__ import annotations

import contextlib
import contextvars
import math
import os
import sys

import numpy as np

from attractorfit.errors import InputError
from attractorfit.recording import file_provenance

#: Accepted values of the ``time_unit`` option and their factor to seconds.
TIME_UNITS = {"s": 1.0, "ms": 1e-3}

#: Fraction of the available memory one array may claim before it is refused.
MEMORY_FRACTION = 0.5

SUPPORTED_FORMATS = (
    "NWB files (.nwb); spike tables (.csv, .tsv, .tab, .txt with a header row); "
    "NPZ archives (.npz with spike_times and spike_units); spike-sorter folders "
    "(spike_times.npy + spike_clusters.npy or spike_templates.npy); NIX files (.nix, .h5) "
    "and the other file and folder formats the neo library reads (e.g. .smr, .plx, .nev, "
    ".abf, .mat)"
)


def source_name(path) -> str:
    """File name used in messages (no folders: messages stay short and path-free)."""
    return os.path.basename(os.path.normpath(os.fspath(path))) or os.fspath(path)


def check_file(path, *, folder: bool = False) -> str:
    """Return ``path`` as str if it names an existing, non-empty file (or a folder)."""
    path = os.fspath(path)
    name = source_name(path)
    if not os.path.exists(path):
        raise InputError(f"{path}: no such file or folder")
    if folder:
        if not os.path.isdir(path):
            raise InputError(f"{name}: expected a folder, got a file")
        return path
    if os.path.isdir(path):
        raise InputError(f"{name}: expected a file, got a folder")
    try:
        size = os.path.getsize(path)
    except OSError as exc:
        raise InputError(f"{name}: cannot read the file ({exc.strerror or exc})") from None
    if size == 0:
        raise InputError(f"{name}: the file is empty (0 bytes); expected a recording")
    if not os.access(path, os.R_OK):
        raise InputError(f"{name}: the file is not readable (permission denied)")
    return path


def time_factor(time_unit, *, option: str = "time_unit") -> float:
    """Factor from ``time_unit`` ('s' or 'ms') to seconds; ``option`` names it in errors."""
    if not isinstance(time_unit, str) or time_unit not in TIME_UNITS:
        raise InputError(f"{option}: expected 's' or 'ms', got {time_unit!r}")
    return TIME_UNITS[time_unit]


@contextlib.contextmanager
def library_errors(path, expected: str, *, label: str | None = None):
    """Turn any exception a reading library raises into an InputError.

    Use only around calls into third-party readers (h5py, pynwb, neo, numpy's
    format module): their failures on a bad file are bad input, not our bugs. The
    message starts with ``label`` (default: the file name), names what was
    expected, and gives the library's own reason.
    """
    label = label or source_name(path)
    try:
        yield
    except InputError:
        raise
    except MemoryError:
        raise InputError(f"{label}: not enough memory to read the file; "
                         f"expected {expected}") from None
    except Exception as exc:  # noqa: BLE001 -- library errors on untrusted files
        reason = str(exc).strip().splitlines()[0][:300] if str(exc).strip() else ""
        kind = type(exc).__name__
        raise InputError(f"{label}: could not read the file as {expected} "
                         f"({kind}{': ' + reason if reason else ''})") from None


# ------------------------------------------------------------------ size limits
def available_memory() -> int:
    """Bytes of memory available now (MemAvailable on Linux; else a safe guess)."""
    try:
        with open("/proc/meminfo", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    try:
        return int(os.sysconf("SC_AVPHYS_PAGES")) * int(os.sysconf("SC_PAGE_SIZE"))
    except (ValueError, OSError, AttributeError):
        return 4 << 30


def check_claimed_size(where: str, shape, itemsize: int, *, what: str | None = None) -> int:
    """Refuse an array whose claimed size exceeds :data:`MEMORY_FRACTION` of free memory.

    Called with the shape read from a file header, before anything is allocated.
    ``what`` replaces "an array of shape ..." in the message. Returns the number of
    elements.
    """
    count = math.prod(int(s) for s in shape)
    nbytes = count * max(int(itemsize), 1)
    limit = int(available_memory() * MEMORY_FRACTION)
    if nbytes > limit:
        what = what or f"an array of shape {tuple(int(s) for s in shape)}"
        raise InputError(f"{where}: the file claims {what} ({nbytes / 1e9:.3g} GB of "
                         f"memory), more than the {limit / 1e9:.3g} GB that can be allocated "
                         "now; expected a smaller or uncorrupted file")
    return count


#: Memory one row of a text table takes while it is parsed (Python strings and list
#: slots for the kept fields, then the arrays), in bytes; a generous estimate.
TEXT_ROW_BYTES = 256


def check_text_size(path, where: str) -> None:
    """Refuse a text table whose rows would not fit in memory, before reading it.

    The number of rows is estimated from the file size and the line length of its
    first MiB.
    """
    size = os.path.getsize(path)
    with open(path, "rb") as fh:
        head = fh.read(1 << 20)
    rows = max(head.count(b"\n"), 1) * (size / max(len(head), 1))
    check_claimed_size(where, (math.ceil(rows),), TEXT_ROW_BYTES,
                       what=f"about {rows:.3g} rows of text ({size / 1e9:.3g} GB on disk)")


#: Python code run in a child process to walk an HDF5 file before the parent opens it.
_HDF5_WALK = """
import sys
import h5py
small = int(sys.argv[2])
def touch(obj):
    for key in obj.attrs.keys():
        obj.attrs[key]
def visit(name, obj):
    touch(obj)
    if isinstance(obj, h5py.Dataset) and obj.shape is not None:
        if obj.size * obj.dtype.itemsize <= small:
            obj[()]
with h5py.File(sys.argv[1], "r") as fh:
    touch(fh)
    fh.visititems(visit)
"""
#: Datasets up to this size (bytes) are read in full by the child walk.
HDF5_WALK_BYTES = 16 << 20
#: Seconds the child walk may take before the file is refused.
HDF5_WALK_TIMEOUT = 120.0


def hdf5_preflight(path, label: str | None = None) -> None:
    """Walk an HDF5 file in a child process before it is opened here.

    A corrupt HDF5 file can crash the HDF5 C library (segmentation fault) while its
    attributes are read, which would kill this process with no message. The child
    opens the file read-only, reads every attribute and every dataset up to
    :data:`HDF5_WALK_BYTES`; if it dies from a signal or hangs, the file is refused
    with an InputError. A Python-level failure in the child is left to the reader,
    which reports it. Data of larger datasets is not walked.
    """
    import subprocess

    label = label or source_name(path)
    try:
        proc = subprocess.run([sys.executable, "-I", "-c", _HDF5_WALK, os.fspath(path),
                               str(HDF5_WALK_BYTES)], capture_output=True,
                              timeout=HDF5_WALK_TIMEOUT, check=False)
    except subprocess.TimeoutExpired:
        raise InputError(f"{label}: reading the file's HDF5 structure did not finish in "
                         f"{HDF5_WALK_TIMEOUT:g} s; expected an uncorrupted HDF5 file"
                         ) from None
    except OSError:  # no usable interpreter to start (embedded Python): no walk
        return
    if proc.returncode < 0:
        raise InputError(f"{label}: reading the file's HDF5 structure crashed the HDF5 "
                         f"library (signal {-proc.returncode}); the file is corrupt, "
                         "expected an uncorrupted HDF5 file")


def read_npy_header(fh, where: str):
    """Read the header of one ``.npy`` stream; return (shape, fortran_order, dtype).

    Refuses object dtypes (they need pickle) and absurd sizes, without reading data.
    """
    with library_errors(where, "a NumPy .npy array", label=where):
        version = np.lib.format.read_magic(fh)
        if version == (1, 0):
            shape, fortran, dtype = np.lib.format.read_array_header_1_0(fh)
        else:  # (2, 0) and (3, 0) share the 4-byte header length; descr is ASCII
            shape, fortran, dtype = np.lib.format.read_array_header_2_0(fh)
    if dtype.hasobject:
        raise InputError(f"{where}: the array holds Python objects (dtype {dtype}), which "
                         "can only be read with pickle; expected numbers or text")
    check_claimed_size(where, shape, dtype.itemsize)
    return shape, fortran, dtype


def load_npy(path, where: str | None = None) -> np.ndarray:
    """Load a ``.npy`` file safely: header checked first, never with pickle."""
    where = where or source_name(path)
    with open(path, "rb") as fh:
        read_npy_header(fh, where)
        fh.seek(0)
        with library_errors(path, "a NumPy .npy array", label=where):
            return np.lib.format.read_array(fh, allow_pickle=False)


# ------------------------------------------------------------ file-read tracking
_TRACKED: contextvars.ContextVar = contextvars.ContextVar("attractorfit_io_tracked",
                                                          default=None)
_HOOK_INSTALLED = False


def _audit_hook(event, args):
    if event != "open":
        return
    tracked = _TRACKED.get()
    if tracked is None:
        return
    path = args[0] if args else None
    if isinstance(path, (str, bytes, os.PathLike)):
        try:
            tracked.append(os.path.abspath(os.fsdecode(path)))
        except (TypeError, ValueError):
            pass


@contextlib.contextmanager
def track_reads(folder):
    """Collect the files opened from Python under ``folder`` while the block runs.

    Uses an audit hook (``sys.addaudithook``), installed once and inert outside this
    context. Files opened by compiled libraries (HDF5) are not seen; callers add the
    main input file themselves. Yields a list that fills with existing regular files.
    """
    global _HOOK_INSTALLED
    if not _HOOK_INSTALLED:
        sys.addaudithook(_audit_hook)
        _HOOK_INSTALLED = True
    opened: list = []
    token = _TRACKED.set(opened)
    found: list = []
    try:
        yield found
    finally:
        _TRACKED.reset(token)
        root = os.path.abspath(os.fspath(folder))
        for p in dict.fromkeys(opened):
            if (p == root or p.startswith(root + os.sep)) and os.path.isfile(p):
                found.append(p)


def provenance_of(paths) -> list:
    """Provenance records (path, size, SHA-256) of ``paths``, duplicates removed."""
    out, seen = [], set()
    for p in paths:
        key = os.path.realpath(p)
        if key not in seen:
            seen.add(key)
            out.append(file_provenance(p))
    return out


# ------------------------------------------------------------------ assembly
def resolve_trials(file_trials, trials_path, *, source: str, time_unit: str,
                   provenance: list, warnings: list, trials_time_unit: str | None = None):
    """Pick the trials table: the one given with ``trials=`` wins over the file's own.

    Appends the trials file's provenance and, when it overrides trials found in the
    recording, a warning saying so. The table's times are in ``trials_time_unit``
    (default: ``time_unit``).
    """
    if trials_time_unit is not None:
        time_factor(trials_time_unit, option="trials_time_unit")
    if trials_path is None:
        if trials_time_unit is not None:
            raise InputError(f"trials_time_unit: given ({trials_time_unit!r}) without a "
                             "trials table; expected it with the option trials=")
        return file_trials
    from attractorfit._validation import collect_input_warnings
    from attractorfit.io._table import read_trials_table

    with collect_input_warnings([], reemit_input=False) as notes:  # emitted by finish()
        table = read_trials_table(trials_path, time_unit=trials_time_unit or time_unit)
    warnings.extend(notes)
    provenance.extend(provenance_of([os.fspath(trials_path)]))
    if file_trials is not None and len(np.asarray(file_trials.get("start", [])).ravel()):
        warnings.append(f"{source}: its own trials table "
                        f"({len(np.asarray(file_trials['start']).ravel())} trials) was "
                        f"replaced by the {len(table['start'])} trials of "
                        f"{source_name(trials_path)} (option trials=)")
    return table


def finish(rec, warnings: list):
    """Put the loader's warnings before the quality warnings of ``rec``; return it.

    Each loader warning is also emitted as an :class:`~attractorfit.errors.InputWarning`
    (the quality warnings were emitted by :meth:`Recording.validate`).
    """
    from attractorfit._validation import warn_input

    for w in dict.fromkeys(warnings):
        if w not in rec.warnings:
            warn_input(w)
    rec.warnings = list(dict.fromkeys(list(warnings) + list(rec.warnings)))
    return rec
