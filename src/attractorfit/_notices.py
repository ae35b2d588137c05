"""The run's warnings as a person reads them: each distinct message once, with a count.

A command collects every warning in one :class:`NoticeBook`:

- warnings about the user's data (:class:`~attractorfit.errors.InputWarning`) are printed
  when they first arrive; a repeat (same text up to its numbers) is only counted;
- warnings about our own surrogate recordings (:class:`SurrogateWarning`, already folded
  over the surrogates by :func:`fold_surrogate_warnings`) are not shown as if they were
  about the data: they go to the run log and summary.json;
- every other warning (convergence of internal fits, numerical warnings) is folded and
  printed once, with its count, when the command ends.

The run log (``run_log.txt``) holds the command's progress messages, with the seconds
since the command started (the stage times), and every notice.
"""

from __future__ import annotations

import contextlib
import logging
import re
import time
import warnings
from dataclasses import dataclass, field

from attractorfit.errors import InputWarning

__all__ = ["Notice", "NoticeBook", "SurrogateWarning", "capture", "fold_surrogate_warnings",
           "message_key"]

_NUMBER = re.compile(r"[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?")
_QUOTED = re.compile(r"'[^']*'")


class SurrogateWarning(UserWarning):
    """A remark about the fitted network's surrogate recordings (not about the data)."""


def message_key(text: str) -> str:
    """``text`` with its numbers and quoted names blanked: repeats that differ only there fold.

    Examples
    --------
    >>> message_key("3 unit(s) fire below 0.5 Hz (first: '1', 0.05 Hz)")
    "# unit(s) fire below # Hz (first: '', # Hz)"
    """
    return _NUMBER.sub("#", _QUOTED.sub("''", text))


@dataclass
class Notice:
    """One distinct message: its first text, its kind and how often it came."""

    text: str
    kind: str  # "data", "surrogates" or "internal"
    count: int = 1

    def as_dict(self) -> dict:
        return {"message": self.text, "count": self.count}


@dataclass
class NoticeBook:
    """Every warning and progress message of one command (see the module docstring)."""

    notices: dict = field(default_factory=dict)
    log_lines: list = field(default_factory=list)

    def add(self, text: str, kind: str) -> bool:
        """Record one message; True when it is new (not a repeat up to its numbers)."""
        key = (kind, message_key(text))
        seen = self.notices.get(key)
        if seen is not None:
            seen.count += 1
            return False
        self.notices[key] = Notice(text=text, kind=kind)
        self.log_lines.append(f"{kind} warning: {text}")
        return True

    def of_kind(self, kind: str) -> list:
        return [n for n in self.notices.values() if n.kind == kind]

    def summary_block(self) -> dict:
        """``summary.json``'s ``warnings`` block: data and surrogate remarks.

        Internal convergence remarks stay in the run log only: with worker processes
        their count depends on where the work ran, and summary.json must not.
        """
        return {"data": [n.as_dict() for n in self.of_kind("data")],
                "surrogates": [n.as_dict() for n in self.of_kind("surrogates")]}

    def closing_lines(self) -> list:
        """Lines printed when the command ends: the folded internal remarks."""
        out = []
        for n in self.of_kind("internal"):
            times = "once" if n.count == 1 else f"{n.count} times"
            out.append(f"attractorfit: note: {n.text} ({times} in this run's internal fits)")
        return out

    def log_text(self) -> str:
        """The run log: progress messages and notices with their counts."""
        lines = list(self.log_lines)
        for n in self.notices.values():
            if n.count > 1:
                lines.append(f"{n.kind} warning repeated {n.count} times in all: {n.text}")
        return "\n".join(lines) + "\n"


class _BookHandler(logging.Handler):
    """Progress messages of the ``attractorfit`` logger into the book's log lines."""

    def __init__(self, book: NoticeBook):
        super().__init__(level=logging.INFO)
        self.book = book
        self.t0 = time.perf_counter()

    def emit(self, record):
        elapsed = time.perf_counter() - self.t0
        self.book.log_lines.append(f"[{elapsed:7.1f} s] {record.getMessage()}")


def _kind(category) -> str:
    if issubclass(category, SurrogateWarning):
        return "surrogates"
    if issubclass(category, InputWarning):
        return "data"
    return "internal"


@contextlib.contextmanager
def capture(book: NoticeBook, stream):
    """Route warnings and progress messages of the block into ``book``.

    Data warnings are written to ``stream`` when new; everything else is only recorded.
    """
    logger = logging.getLogger("attractorfit")
    handler = _BookHandler(book)
    old_level = logger.level
    logger.addHandler(handler)
    if logger.level == logging.NOTSET or logger.level > logging.INFO:
        logger.setLevel(logging.INFO)

    def show(message, category, filename, lineno, file=None, line=None):
        kind = _kind(category)
        if book.add(str(message), kind) and kind == "data":
            stream.write(f"attractorfit: warning: {message}\n")

    with warnings.catch_warnings():
        warnings.simplefilter("always")
        warnings.showwarning = show
        try:
            yield book
        finally:
            logger.removeHandler(handler)
            logger.setLevel(old_level)


def fold_surrogate_warnings(recordings) -> list:
    """One line per distinct remark over surrogate recordings, with how many had it.

    Parameters
    ----------
    recordings : sequence of Recording
        Surrogates whose ``warnings`` lists hold their quality remarks.

    Returns
    -------
    list of str
        For example ``"fitted-network: 3 unit(s) have fewer than 20 spikes (first: '57')
        (in 18 of 20 surrogates)"``; the text is that of the first surrogate with it.
    """
    first, count = {}, {}
    for rec in recordings:
        for key, text in {message_key(w): w for w in rec.warnings}.items():
            first.setdefault(key, text)
            count[key] = count.get(key, 0) + 1
    n = len(recordings)
    return [f"{first[k]} (in {count[k]} of {n} surrogates)" for k in first]
