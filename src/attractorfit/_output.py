"""Atomic, deterministic output writing shared by every stage that writes a file.

Rules (DESIGN.md, Amendment 6): every file is written to a temporary name in the
target folder and renamed; floats carry 10 significant digits; non-finite numbers
are written as JSON null; no timestamps or absolute paths in summary.json/states.csv.
"""

from __future__ import annotations

import csv
import io
import json
import math
import os
import tempfile

import numpy as np

__all__ = ["atomic_write", "atomic_writer", "to_jsonable", "dumps_json", "write_json",
           "write_csv", "format_float"]


def format_float(x: float) -> str:
    """Text form of a float with 10 significant digits ('' for non-finite in CSV)."""
    x = float(x)
    if not math.isfinite(x):
        return ""
    return format(x, ".10g")


class atomic_writer:
    """Context manager: open a temporary file next to ``path``; rename on success.

    On an exception (including KeyboardInterrupt) the temporary file is removed and
    ``path`` is left as it was.
    """

    def __init__(self, path, mode: str = "w", **kw):
        self.path = os.fspath(path)
        self.mode = mode
        self.kw = kw
        if "b" not in mode:
            self.kw.setdefault("encoding", "utf-8")
            self.kw.setdefault("newline", "")

    def __enter__(self):
        folder = os.path.dirname(os.path.abspath(self.path))
        os.makedirs(folder, exist_ok=True)
        fd, self.tmp = tempfile.mkstemp(prefix="." + os.path.basename(self.path) + ".",
                                        suffix=".part", dir=folder)
        os.close(fd)
        self.fh = open(self.tmp, self.mode, **self.kw)
        return self.fh

    def __exit__(self, exc_type, exc, tb):
        try:
            self.fh.close()
        finally:
            if exc_type is None:
                os.chmod(self.tmp, 0o666 & ~_umask())  # as a plain open() would
                os.replace(self.tmp, self.path)
            else:
                try:
                    os.unlink(self.tmp)
                except FileNotFoundError:
                    pass
        return False


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def atomic_write(path, data) -> None:
    """Write ``data`` (str or bytes) to ``path`` atomically."""
    mode = "wb" if isinstance(data, (bytes, bytearray)) else "w"
    with atomic_writer(path, mode) as fh:
        fh.write(data)


def to_jsonable(obj):
    """Convert numpy scalars/arrays and non-finite floats to plain JSON values.

    Floats are rounded to 10 significant digits; NaN and infinities become None.
    """
    if isinstance(obj, dict):
        return {str(k): to_jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [to_jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return to_jsonable(obj.tolist())
    if isinstance(obj, (bool, np.bool_)):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        x = float(obj)
        return float(format(x, ".10g")) if math.isfinite(x) else None
    if obj is None or isinstance(obj, str):
        return obj
    return str(obj)


def dumps_json(obj) -> str:
    """Deterministic JSON text (sorted keys, 2-space indent, trailing newline)."""
    return json.dumps(to_jsonable(obj), indent=2, sort_keys=True, allow_nan=False) + "\n"


def write_json(path, obj) -> None:
    """Write ``obj`` as deterministic JSON, atomically."""
    atomic_write(path, dumps_json(obj))


def write_csv(path, header, rows) -> None:
    """Write a CSV table atomically; floats with 10 significant digits."""
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(header)
    for row in rows:
        w.writerow([format_float(v) if isinstance(v, (float, np.floating)) else v
                    for v in row])
    atomic_write(path, buf.getvalue())
