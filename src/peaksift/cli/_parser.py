"""The ``peaksift`` command's options: every sub-command, its arguments and help text.
Which function runs a sub-command is the caller's (:func:`peaksift.cli.build_parser`)."""

from __future__ import annotations

import argparse
from collections.abc import Callable, Mapping

Handler = Callable[[argparse.Namespace], int]


def _share_opt(q: argparse.ArgumentParser) -> None:
    """The output-folder contract's one switch (see :mod:`peaksift._output`)."""
    q.add_argument("--share-folder", action="store_true",
                   help="write into an output folder that also holds files peaksift did not "
                        "write (they are never touched); without it such a folder is refused")



def build(handlers: Mapping[str, Handler]) -> argparse.ArgumentParser:
    """The parser; ``handlers[name]`` runs sub-command ``name`` (``args.handler``)."""
    from .. import __version__

    p = argparse.ArgumentParser(
        prog="peaksift",
        description="Invariant-mass resonance searches from columnar (Parquet) events: "
                    "spectrum, fits, mass scan, local and global significance, limits, "
                    "figures and a meeting report.",
        epilog="Run 'peaksift COMMAND --help' for a command's options; docs/config.md "
               "documents every configuration key.",
    )
    p.add_argument("--version", action="version", version=f"peaksift {__version__}")
    common = argparse.ArgumentParser(add_help=False)
    g = common.add_argument_group("output")
    g.add_argument("-q", "--quiet", action="store_true",
                   help="no progress bars; print only warnings, errors and the result")
    g.add_argument("-v", "--verbose", action="count", default=0,
                   help="log what runs where (engine, workers, chunks, stage timings); "
                        "-vv for more")
    engine = argparse.ArgumentParser(add_help=False)
    e = engine.add_argument_group("execution")
    e.add_argument("--engine", choices=("serial", "processes", "dask"), default=None,
                   help="where the per-chunk work runs (overrides execution.engine)")
    e.add_argument("--workers", type=int, default=None, metavar="N",
                   help="worker processes or local Dask workers (overrides execution.workers)")
    e.add_argument("--address", default=None, metavar="URL",
                   help="Dask scheduler to use, e.g. tcp://host:8786 (implies --engine dask; "
                        "overrides execution.address)")
    sub = p.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True

    def cmd(name: str, summary: str, description: str, parents: list) -> argparse.ArgumentParser:
        return sub.add_parser(name, help=summary, description=description, parents=parents)

    q = cmd("inspect", "describe Parquet or Arrow IPC event files (collections, fields, counts)",
            "Describe Parquet or Arrow IPC event files: collections and their layouts, fields "
            "and dtypes, events per file and object multiplicities.", [common])
    q.add_argument("--column-pattern", default="{collection}.{field}",
                   help="how sibling list columns name a collection's fields (default "
                        "%(default)s; e.g. {collection}_{field})")
    q.add_argument("paths", nargs="+", metavar="PATH",
                   help="event files, directories or glob patterns (quote globs)")
    q.set_defaults(handler=handlers["inspect"])

    d = cmd("demo", "write the demo scenario's events, truth file and config",
            "Write the demo scenario: an invented collider run with a Z calibration peak and "
            "one invented resonance, as Parquet files, truth.json and a ready search.toml.",
            [common])
    d.add_argument("outdir", metavar="OUTDIR",
                   help="directory to write into (created); a rerun replaces only the demo's own "
                        "files, and refuses if one was edited since or if other files are "
                        "there (unless --share-folder)")
    d.add_argument("--events", type=int, default=None, help="number of events (default: demo size)")
    d.add_argument("--seed", type=int, default=None, help="random seed (default: the demo's own)")
    d.add_argument("--weighted", action="store_true", help="simulated-sample variant with weights")
    _share_opt(d)
    d.set_defaults(handler=handlers["demo"])

    config_help = "the search's TOML configuration (every key: docs/config.md)"
    s = cmd("search", "the whole search: spectrum, fits, scan, significance, limits, report",
            "Run the whole search of a configuration: the selected spectrum, the "
            "signal-plus-background and background-only fits, the mass scan, local and global "
            "significance, upper limits, the calibration check, figures, results.json and "
            "the report (Markdown and HTML).", [common, engine])
    s.add_argument("config", metavar="CONFIG", help=config_help)
    s.add_argument("--out", default=None, help="output directory (default: output.dir)")
    s.add_argument("--unblind", action="store_true", help="lift the configured blinding")
    s.add_argument("--toys", type=int, default=None, help="override significance.toys")
    s.add_argument("--seed", type=int, default=None, help="override significance.seed")
    _share_opt(s)
    s.set_defaults(handler=handlers["search"])

    sp = cmd("spectrum", "only the selected spectrum: histogram file and figure",
             "Select, pair and histogram the events of a configuration: spectrum.json and its "
             "figure (and the candidates' pT/rapidity figure), no fit.", [common, engine])
    sp.add_argument("config", metavar="CONFIG", help=config_help)
    sp.add_argument("--out", default=None, help="output directory (default: output.dir)")
    _share_opt(sp)
    sp.set_defaults(handler=handlers["spectrum"])

    f = cmd("fit", "one signal-plus-background fit at a chosen mass",
            "One signal-plus-background fit of the configured spectrum, started (or held, "
            "--hold-mass) at a chosen mass, with profile-likelihood intervals.",
            [common, engine])
    f.add_argument("config", metavar="CONFIG", help=config_help)
    f.add_argument("--mass", type=float, required=True,
                   help="peak mass in GeV where the fit starts (the mass then floats)")
    f.add_argument("--hold-mass", action="store_true",
                   help="hold the peak mass fixed at --mass instead of letting it float")
    f.add_argument("--out", default=None,
                   help="directory for the fit's JSON and figure (new, empty, or a previous "
                        "`peaksift fit` output)")
    f.add_argument("--unblind", action="store_true", help="fit even if the config is blinded")
    _share_opt(f)
    f.set_defaults(handler=handlers["fit"])
    return p
