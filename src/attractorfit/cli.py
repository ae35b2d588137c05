"""The ``attractorfit`` command.

Exit status: 0 done; 2 bad input or usage (one line on stderr, no traceback); 1 a bug.
"""

from __future__ import annotations

import argparse
import sys
import warnings

from attractorfit.errors import InputError, InputWarning

__all__ = ["main", "build_parser"]


class _Parser(argparse.ArgumentParser):
    """argparse that reports usage errors as one line and exit status 2."""

    def error(self, message):
        raise InputError(f"{self.prog}: {message}")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="attractorfit",
        description="Test whether delay-period population activity behaves like discrete "
                    "attractor states, and fit a low-rank spiking network that reproduces it.")
    parser.add_argument("--version", action="store_true", help="print the version and exit")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    from attractorfit import _commands

    _commands.register(sub)
    return parser


def _terminate(signum, frame):  # pragma: no cover - exercised in a subprocess test
    raise KeyboardInterrupt


def _ignore_further_signals() -> None:
    """After the first interrupt, later SIGINT/SIGTERM must not cut the clean exit short."""
    import signal

    for sig in (signal.SIGINT, signal.SIGTERM):
        try:
            signal.signal(sig, signal.SIG_IGN)
        except ValueError:  # not the main thread
            pass


def main(argv=None) -> int:
    """Run the command line; return the exit status."""
    import signal

    try:
        signal.signal(signal.SIGTERM, _terminate)  # SIGTERM unwinds like Ctrl-C
    except ValueError:  # not the main thread (e.g. called from a test runner thread)
        pass
    try:
        parser = build_parser()
        args = parser.parse_args(argv)
        if args.version:
            from attractorfit import __version__

            print(__version__)
            return 0
        if not getattr(args, "func", None):
            parser.print_help()
            return 2
        if getattr(args, "verbose", False):
            import logging

            handler = logging.StreamHandler(sys.stderr)
            handler.setFormatter(logging.Formatter("attractorfit: %(message)s"))
            logger = logging.getLogger("attractorfit")
            logger.addHandler(handler)
            logger.setLevel(logging.INFO)
        with warnings.catch_warnings():
            warnings.simplefilter("default", InputWarning)
            warnings.formatwarning = _format_warning
            return int(args.func(args) or 0)
    except InputError as exc:
        print(f"attractorfit: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        _ignore_further_signals()
        try:
            print("attractorfit: interrupted; no partial output was kept", file=sys.stderr)
        except KeyboardInterrupt:  # pragma: no cover - a second signal while reporting
            pass
        return 130
    except BrokenPipeError:
        return 0


def _format_warning(message, category, filename, lineno, line=None):
    return f"attractorfit: warning: {message}\n"


if __name__ == "__main__":  # pragma: no cover
    code = main()
    sys.stderr.flush()
    sys.exit(code)
