"""Shared input checks used at the public edge of every stage.

The numerical core assumes clean data; every check lives here once, and every
message names the source (file or parameter), the rule and the offending value.
"""

from __future__ import annotations

import contextlib
import math
import warnings
from numbers import Integral, Real

import numpy as np

from attractorfit.errors import InputError, InputWarning

__all__ = [
    "check_positive",
    "check_nonnegative",
    "check_int",
    "check_fraction",
    "check_spike_times",
    "check_trials",
    "check_rng",
    "check_array",
    "warn_input",
    "collect_input_warnings",
]


def warn_input(message: str) -> None:
    """Emit an :class:`InputWarning` pointing at the caller's caller."""
    warnings.warn(message, InputWarning, stacklevel=3)


@contextlib.contextmanager
def collect_input_warnings(into: list, *, reemit_input: bool = True):
    """Run a block and append the text of each InputWarning it emits to ``into``.

    Every other warning is re-emitted as it was; InputWarnings too unless
    ``reemit_input`` is False (for a caller that emits them later itself).
    """
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            yield into
        finally:
            pending = list(caught)
    for w in pending:
        is_input = issubclass(w.category, InputWarning)
        if is_input:
            into.append(str(w.message))
        if reemit_input or not is_input:
            warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)


def _is_real(value) -> bool:
    return isinstance(value, Real) and not isinstance(value, bool)


def check_positive(name: str, value, *, allow_inf: bool = False) -> float:
    """Return ``value`` as float if it is a finite number > 0, else raise InputError."""
    if not _is_real(value) or math.isnan(float(value)):
        raise InputError(f"{name}: expected a positive number, got {value!r}")
    value = float(value)
    if value <= 0 or (math.isinf(value) and not allow_inf):
        raise InputError(f"{name}: expected a finite number > 0, got {value!r}")
    return value


def check_nonnegative(name: str, value) -> float:
    """Return ``value`` as float if it is a finite number >= 0, else raise InputError."""
    if not _is_real(value) or not math.isfinite(float(value)) or float(value) < 0:
        raise InputError(f"{name}: expected a finite number >= 0, got {value!r}")
    return float(value)


def check_fraction(name: str, value, *, low: float = 0.0, high: float = 1.0) -> float:
    """Return ``value`` as float if ``low <= value <= high``, else raise InputError."""
    if not _is_real(value) or not (low <= float(value) <= high):
        raise InputError(f"{name}: expected a number in [{low}, {high}], got {value!r}")
    return float(value)


def check_int(name: str, value, *, low: int | None = None, high: int | None = None) -> int:
    """Return ``value`` as int if it is an integer within [low, high], else raise InputError."""
    if isinstance(value, bool) or not isinstance(value, Integral):
        raise InputError(f"{name}: expected a whole number, got {value!r}")
    value = int(value)
    if low is not None and value < low:
        raise InputError(f"{name}: expected a whole number >= {low}, got {value}")
    if high is not None and value > high:
        raise InputError(f"{name}: expected a whole number <= {high}, got {value}")
    return value


def check_rng(rng) -> np.random.Generator:
    """Convert ``rng`` (None, int seed, SeedSequence or Generator) to a Generator."""
    if isinstance(rng, np.random.Generator):
        return rng
    if rng is None or isinstance(rng, (Integral, np.random.SeedSequence)) and not isinstance(rng, bool):
        if isinstance(rng, Integral) and int(rng) < 0:
            raise InputError(f"seed: expected a whole number >= 0, got {rng}")
        return np.random.default_rng(rng)
    raise InputError(f"rng: expected None, a whole-number seed or a numpy Generator, got {rng!r}")


def check_array(name: str, value, *, ndim: int | None = None, finite: bool = True,
                dtype=float) -> np.ndarray:
    """Return ``value`` as an array of ``dtype``; check its dimensions and finiteness."""
    try:
        arr = np.asarray(value, dtype=dtype)
    except (TypeError, ValueError) as exc:
        raise InputError(f"{name}: expected an array of numbers ({exc})") from None
    if ndim is not None and arr.ndim != ndim:
        raise InputError(f"{name}: expected a {ndim}-dimensional array, got shape {arr.shape}")
    if finite and arr.size and not np.all(np.isfinite(arr)):
        bad = np.argwhere(~np.isfinite(arr))[0]
        idx = tuple(int(i) for i in bad)
        raise InputError(f"{name}: element {idx if len(idx) > 1 else idx[0]} is "
                         f"{arr[tuple(bad)].item()!r}, expected a finite number")
    return arr


def check_spike_times(times, *, source: str, unit: str) -> np.ndarray:
    """Validate one unit's spike times (seconds) and return them sorted, float64.

    Raises InputError for non-finite or negative times; unsorted input is sorted
    with a warning (safe: spike order carries no information beyond time).
    """
    arr = np.asarray(times, dtype=np.float64).ravel()
    if arr.size:
        bad = ~np.isfinite(arr)
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            raise InputError(f"{source}: unit {unit!r}: spike time {arr[i].item()!r} (index {i}) "
                             "is not a finite number of seconds")
        if arr.min() < 0:
            i = int(np.argmin(arr))
            raise InputError(f"{source}: unit {unit!r}: spike time {arr[i].item()!r} (index {i}) "
                             "is negative; expected seconds >= 0")
        if np.any(np.diff(arr) < 0):
            warn_input(f"{source}: unit {unit!r}: spike times were not in order; sorted them")
            arr = np.sort(arr, kind="stable")
    return arr


def check_trials(start, stop, *, source: str,
                 row_labels=None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Validate trial start/stop times; return (start, stop, order) sorted by start.

    Raises InputError for non-finite or negative times, stop <= start, and overlapping
    trials. Trials given out of order are sorted with a warning. ``row_labels``
    (optional, one text per trial, e.g. ``"line 4"``) names the rows in messages as
    ``"<source> line 4: ..."``; by default rows are ``"<source>: trial <i>: ..."``.
    """
    start = np.asarray(start, dtype=np.float64).ravel()
    stop = np.asarray(stop, dtype=np.float64).ravel()
    if start.shape != stop.shape:
        raise InputError(f"{source}: trials table has {start.size} start times but "
                         f"{stop.size} stop times")

    def row(i):
        if row_labels is None:
            return f"{source}: trial {i}"
        return f"{source} {row_labels[i]}"

    for name, col in (("start", start), ("stop", stop)):
        bad = ~np.isfinite(col)
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            raise InputError(f"{row(i)}: {name} {col[i].item()!r} is not a finite number "
                             "of seconds")
        if col.size and col.min() < 0:
            i = int(np.argmin(col))
            raise InputError(f"{row(i)}: {name} {col[i].item()!r} is negative; expected "
                             "seconds >= 0")
    bad = stop <= start
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise InputError(f"{row(i)}: stop {stop[i].item()!r} is not after start "
                         f"{start[i].item()!r}; expected stop > start")
    order = np.argsort(start, kind="stable")
    if np.any(order != np.arange(order.size)):
        warn_input(f"{source}: trials were not in order of start time; sorted them")
    s, e = start[order], stop[order]
    overlap = s[1:] < e[:-1]
    if overlap.any():
        i = int(np.flatnonzero(overlap)[0])
        a, b = int(order[i]), int(order[i + 1])
        if row_labels is None:
            names = f"{source}: trials {a} ({s[i]:g}-{e[i]:g} s) and {b}"
        else:
            names = (f"{source}: trials at {row_labels[a]} ({s[i]:g}-{e[i]:g} s) and "
                     f"{row_labels[b]}")
        raise InputError(f"{names} ({s[i + 1]:g}-{e[i + 1]:g} s) overlap; "
                         "expected disjoint trials")
    return s, e, order
