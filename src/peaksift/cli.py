"""The ``peaksift`` command.

Sub-commands::

    peaksift inspect PATH...        what is in a set of Parquet event files
    peaksift demo OUTDIR            write the demo scenario (events, truth, ready config)
    peaksift search CONFIG          the whole search (spectrum, fit, scan, significance, limits, report)
    peaksift spectrum CONFIG        only the selected spectrum: histogram file and figure
    peaksift fit CONFIG --mass M    one signal-plus-background fit at a chosen mass

A user's mistake (a :class:`~peaksift.errors.PeaksiftError`) prints one line on stderr and
exits with status 2; no traceback.
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Callable, Sequence

from .errors import PeaksiftError

Handler = Callable[[argparse.Namespace], int]


def _cmd_inspect(args: argparse.Namespace) -> int:
    from .events import describe

    print(describe(args.paths if len(args.paths) > 1 else args.paths[0]))
    return 0


def _cmd_demo(args: argparse.Namespace) -> int:
    from .simulate import write_demo

    info = write_demo(args.outdir, n_events=args.events, seed=args.seed, weighted=args.weighted)
    print(info["summary"] if isinstance(info, dict) and "summary" in info else info)
    return 0


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="peaksift",
        description="Invariant-mass resonance searches from columnar (Parquet) events.",
    )
    from . import __version__

    p.add_argument("--version", action="version", version=f"peaksift {__version__}")
    sub = p.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True

    q = sub.add_parser("inspect", help="describe Parquet event files (collections, fields, counts)")
    q.add_argument("paths", nargs="+", help="files, directories or globs")
    q.set_defaults(handler=_cmd_inspect)

    d = sub.add_parser("demo", help="write the demo scenario's events, truth file and config")
    d.add_argument("outdir")
    d.add_argument("--events", type=int, default=None, help="number of events (default: demo size)")
    d.add_argument("--seed", type=int, default=None, help="random seed (default: the demo's own)")
    d.add_argument("--weighted", action="store_true", help="simulated-sample variant with weights")
    d.set_defaults(handler=_cmd_demo)
    return p


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return int(args.handler(args) or 0)
    except PeaksiftError as exc:
        print("peaksift: error: " + " ".join(str(exc).split()), file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("peaksift: interrupted; no outputs were written", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
