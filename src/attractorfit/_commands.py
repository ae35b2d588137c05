"""Sub-commands of the ``attractorfit`` command line (argument parsing and wiring only)."""

from __future__ import annotations


def register(sub) -> None:
    """Add every sub-command to the argparse sub-parser collection ``sub``."""
    p = sub.add_parser("inspect", help="summarise a recording: units, rates, trials, warnings",
                       description="Load a recording and print per-unit and per-recording "
                                   "statistics and any warnings about the input.")
    p.add_argument("path", help="recording file or sorter folder")
    p.add_argument("--trials", help="trials table (CSV/TSV) when it is a separate file")
    p.add_argument("--json", action="store_true", help="print JSON instead of plain text")
    p.set_defaults(func=_inspect)


def _inspect(args) -> int:
    from attractorfit.io import load

    rec = load(args.path, trials=args.trials)
    print(rec)
    return 0
