"""Format dispatch for :func:`attractorfit.load` (filled in by the io work)."""

from __future__ import annotations

import os

from attractorfit.errors import InputError


def load(path, **options):
    """Load a recording from ``path``; see the io package for formats."""
    path = os.fspath(path)
    if not os.path.exists(path):
        raise InputError(f"{path}: no such file or folder")
    raise InputError(f"{path}: no reader for this file yet")
