"""One BLAS/OpenMP thread inside a computation, so its float reductions (and every
result that depends on them) are the same whatever the machine's thread settings."""

from __future__ import annotations

import functools
from contextlib import contextmanager

__all__ = ["one_thread", "single_threaded"]


@contextmanager
def one_thread():
    """Pin BLAS/OpenMP pools to one thread for the duration of the block."""
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # pragma: no cover - scikit-learn depends on it
        yield
        return
    with threadpool_limits(limits=1):
        yield


def single_threaded(func):
    """Decorator: run ``func`` under :func:`one_thread`."""

    @functools.wraps(func)
    def wrapper(*args, **kwargs):
        with one_thread():
            return func(*args, **kwargs)

    return wrapper
