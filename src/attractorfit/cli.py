"""The ``attractorfit`` command.

Exit status: 0 done; 2 bad input or usage (one line on stderr, no traceback); 1 a bug.
"""

from __future__ import annotations

import argparse
import sys
from attractorfit.errors import InputError

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


_INTERRUPTED = False


def _interrupt(signum, frame):  # pragma: no cover - exercised in a subprocess test
    """SIGINT/SIGTERM: remember it, then unwind like Ctrl-C so atomic writers clean up.

    The flag matters because the KeyboardInterrupt can surface wrapped in another
    exception (a numba callback turns it into SystemError) or be swallowed by a
    C callback; ``main`` trusts the flag, not the exception type.
    """
    global _INTERRUPTED
    _INTERRUPTED = True
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

    global _INTERRUPTED
    _INTERRUPTED = False
    previous = {}
    for sig in (signal.SIGINT, signal.SIGTERM):
        try:
            previous[sig] = signal.signal(sig, _interrupt)
        except ValueError:  # not the main thread (e.g. called from a test runner thread)
            pass
    try:
        return _main(argv)
    finally:
        if not _INTERRUPTED:  # after an interrupt, further signals stay ignored until exit
            for sig, handler in previous.items():
                signal.signal(sig, handler)


def _main(argv) -> int:
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
        from attractorfit._notices import NoticeBook, capture

        args.notices = NoticeBook()
        with capture(args.notices, sys.stderr):
            code = int(args.func(args) or 0)
        for line in args.notices.closing_lines():
            print(line, file=sys.stderr)
        if _INTERRUPTED:  # pragma: no cover - timing dependent
            print("attractorfit: an interrupt arrived inside a compiled-code callback and was "
                  "lost; the command finished and its outputs are complete", file=sys.stderr)
        return code
    except InputError as exc:
        if _INTERRUPTED:
            return _interrupted()
        print(f"attractorfit: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        return _interrupted()
    except BrokenPipeError:
        return 0
    except BaseException:
        if _INTERRUPTED:  # the interrupt surfaced wrapped in another exception
            return _interrupted()
        raise


def _interrupted() -> int:
    _ignore_further_signals()
    try:
        print("attractorfit: interrupted; no partial output was kept", file=sys.stderr)
    except KeyboardInterrupt:  # pragma: no cover - a second signal while reporting
        pass
    return 130


def run() -> None:
    """Console-script entry: ``main`` then exit with its status.

    After an interrupt the process leaves through ``os._exit(130)``: CPython marks a
    KeyboardInterrupt that passed through ``exec`` of a string (dataclasses do that
    while a module is imported) as unhandled even when ``main`` caught it, and would
    then kill itself with SIGINT at shutdown instead of returning 130.
    """
    import os

    code = main()
    try:
        sys.stdout.flush()
        sys.stderr.flush()
    except (OSError, ValueError):  # pragma: no cover - closed or broken pipe
        pass
    if code == 130:
        os._exit(130)
    sys.exit(code)


if __name__ == "__main__":  # pragma: no cover
    run()
