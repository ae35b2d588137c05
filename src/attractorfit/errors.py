"""Exceptions and warnings raised by attractorfit."""

__all__ = ["InputError", "InputWarning"]


class InputError(ValueError):
    """Bad user input: a file, a value or an option that breaks a stated rule.

    The message names the file (or parameter), the offending value and what was
    expected.  The command line turns it into one line on stderr and exit status 2.
    """


class InputWarning(UserWarning):
    """Suspicious but usable input (e.g. times that look like milliseconds)."""
