"""NIX and every other file or folder format the neo library reads."""

from __future__ import annotations

import contextlib
import logging
import os

from attractorfit.errors import InputError
from attractorfit.io._common import (SUPPORTED_FORMATS, check_claimed_size, check_file,
                                     finish, hdf5_preflight, library_errors, provenance_of,
                                     resolve_trials, source_name, track_reads)
from attractorfit.recording import Recording

__all__ = ["read_neo"]

#: neo IO classes (by class name) never used, and why.
REFUSED_IOS = {
    "PickleIO": "a pickle file can run arbitrary code when it is read",
    "ExampleIO": "neo's example IO makes up data instead of reading the file",
    "NWBIO": "NWB files are read with pynwb (read_nwb), which keeps the trials table",
}
#: Keyword arguments that make an IO class (by module and name) open its file read-only.
_READ_ONLY_KWARGS = {"neo.io.nixio.NixIO": {"mode": "ro"}}


def _full_name(cls) -> str:
    return f"{cls.__module__}.{cls.__qualname__}"


def _candidates(path, name: str) -> list:
    import neo.io

    try:
        found = neo.io.list_candidate_ios(path)
    except (ValueError, OSError) as exc:
        kind = "folder" if os.path.isdir(path) else "file type"
        raise InputError(f"{name}: no reader for this {kind} ({exc}); supported: "
                         f"{SUPPORTED_FORMATS}") from None
    out = list(dict.fromkeys(found))
    usable = [c for c in out if c.__name__ not in REFUSED_IOS]
    if not usable:
        reasons = "; ".join(REFUSED_IOS[c.__name__] for c in out if c.__name__ in REFUSED_IOS)
        raise InputError(f"{name}: not read ({reasons or 'neo has no reader for it'}); "
                         f"supported: {SUPPORTED_FORMATS}")
    return usable


@contextlib.contextmanager
def _quiet_neo():
    """Silence neo's log warnings while a candidate IO tries a file (they would
    flood the terminal on a file of the wrong format); failures are reported."""
    logger = logging.getLogger("neo")
    level = logger.level
    logger.setLevel(logging.ERROR)
    try:
        yield
    finally:
        logger.setLevel(level)


def _read_spikes_block(cls, path):
    """One neo Block with only spike trains and epochs loaded (signals stay on disk)."""
    import neo
    from neo.io.proxyobjects import BaseProxy

    if not lazy_ok(cls):
        _check_hdf5_size(path)
    io = cls(path, **_READ_ONLY_KWARGS.get(_full_name(cls), {}))
    try:
        lazy = lazy_ok(io)
        block = io.read_block(lazy=True) if lazy else io.read_block()
        if block is None:
            raise ValueError("the file holds no block of data")
        if lazy:  # spike counts are known before anything is loaded
            claimed = sum(int(getattr(st, "shape", (0,))[0]) for seg in block.segments
                          for st in seg.spiketrains if isinstance(st, BaseProxy))
            check_claimed_size(source_name(path), (claimed,), 8,
                               what=f"{claimed} spike times")
        out = neo.Block(name=block.name)
        for seg in block.segments:
            new = neo.Segment(name=seg.name)
            for st in seg.spiketrains:
                new.spiketrains.append(st.load() if isinstance(st, BaseProxy) else st)
            for ep in seg.epochs:
                new.epochs.append(ep.load() if isinstance(ep, BaseProxy) else ep)
            out.segments.append(new)
        return out
    finally:
        close = getattr(io, "close", None)
        if callable(close):
            close()


def lazy_ok(io) -> bool:
    """Whether the IO class (or instance) can read lazily (and so report sizes first)."""
    return bool(getattr(io, "support_lazy", False))


def _check_hdf5_size(path) -> None:
    """Refuse an HDF5 file (e.g. NIX) whose datasets together claim too much memory.

    An IO that cannot read lazily loads every dataset; their shapes are read from the
    file's metadata (read-only) before anything is allocated. Not HDF5: no check.
    """
    if os.path.isdir(path):
        return
    import h5py
    import numpy as np

    try:
        if not h5py.is_hdf5(path):
            return
    except OSError:
        return
    total = [0]

    def visit(_, obj):
        if isinstance(obj, h5py.Dataset) and obj.shape is not None:
            total[0] += int(np.prod(obj.shape, dtype=np.float64)) * int(obj.dtype.itemsize)

    hdf5_preflight(path)  # a corrupt file can crash the HDF5 library: try it in a child
    with library_errors(path, "an HDF5 file"):
        with h5py.File(path, "r") as fh:
            fh.visititems(visit)
    check_claimed_size(source_name(path), (total[0],), 1,
                       what=f"HDF5 datasets of {total[0]} bytes in all")


def _has_trials_epoch(block) -> bool:
    return any((ep.name or "").lower() == "trials" for seg in block.segments
               for ep in seg.epochs)


def read_neo(path, *, trials=None, time_unit: str = "s",
             trials_time_unit: str | None = None) -> Recording:
    """Read a file or folder through neo's IO classes (NIX, Spike2, Plexon, Blackrock...).

    The candidate IO classes come from the path's suffix (or a folder's contents)
    via ``neo.io.list_candidate_ios`` -- the lookup behind ``neo.io.get_io`` -- and
    are tried in turn until one reads the data. NIX files are opened read-only.
    Only spike trains and epochs are loaded (lazily where the IO allows).

    Parameters
    ----------
    path : str or path-like
        A file, or a folder for folder-based formats.
    trials : str or path-like, optional
        A trials table (see :func:`read_trials_table`) that replaces the file's trials.
    time_unit : {'s', 'ms'}
        Unit of the times in the ``trials`` table (neo carries its own units).
    trials_time_unit : {'s', 'ms'}, optional
        Unit of the ``trials`` table when it differs from ``time_unit``.

    Returns
    -------
    Recording
        Trials from an Epoch named ``trials`` (labels from its array annotations);
        otherwise each segment of a multi-segment file becomes a trial.

    Raises
    ------
    InputError
        No neo IO for the suffix, a refused IO (pickle files, neo's example IO, NWB
        which :func:`read_nwb` reads), every candidate IO failing on the file, a file
        claiming more memory than is available (HDF5 dataset shapes for IOs that read
        everything, spike counts of lazy IOs; checked before loading), bad times or
        trials, fewer than two units, no spikes.

    References
    ----------
    .. [1] Garcia S, Guarino D, Jaillet F, Jennings T, Pröpper R, Rautenberg PL, et al.
       (2014). Neo: an object model for handling electrophysiology data in multiple
       formats. Frontiers in Neuroinformatics 8:10.
    """
    path = os.fspath(path)
    is_dir = os.path.isdir(path)
    path = check_file(path, folder=is_dir)
    name = source_name(path)
    folder = path if is_dir else os.path.dirname(os.path.abspath(path))
    errors = []
    for cls in _candidates(path, name):
        try:
            with track_reads(folder) as opened, _quiet_neo():
                block = _read_spikes_block(cls, path)
        except InputError:  # our own checks (e.g. a claimed size): not a library failure
            raise
        except Exception as exc:  # noqa: BLE001 -- library failure on this file
            reason = (str(exc).strip().splitlines() or [""])[0][:200]
            errors.append(f"{cls.__name__}: {type(exc).__name__}"
                          f"{': ' + reason if reason else ''}")
            continue
        break
    else:
        raise InputError(f"{name}: could not read it with neo ({'; '.join(errors)}); "
                         f"expected a valid file of the format its suffix names")
    files = ([] if is_dir else [path]) + opened
    if is_dir and not opened:  # files opened by compiled code are not seen: take all
        files = sorted(os.path.join(d, f) for d, _, fs in os.walk(path) for f in fs)
    provenance = provenance_of(files)
    warnings: list = []
    with library_errors(path, f"spike trains readable by neo's {cls.__name__}"):
        rec = Recording.from_neo(block, source=name, provenance=provenance,
                                 metadata={"format": f"neo:{cls.__name__}"}, validate=False)
    rec.metadata["source"] = name
    if rec.trials is not None and not _has_trials_epoch(block) and trials is None:
        warnings.append(f"{name}: no 'trials' epoch; each of the {len(block.segments)} "
                        "segments became a trial")
    rec.trials = resolve_trials(rec.trials, trials, source=name, time_unit=time_unit,
                                trials_time_unit=trials_time_unit,
                                provenance=rec.provenance, warnings=warnings)
    return finish(rec.validate(), warnings)
