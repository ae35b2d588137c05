"""Readers and writers. Every reader returns a :class:`~attractorfit.recording.Recording`.

``load(path, **options)`` picks the reader from the path (file suffix or folder
contents). Only this package and :mod:`attractorfit.pipeline` touch disk.
"""

from attractorfit.io._load import load

__all__ = ["load"]
