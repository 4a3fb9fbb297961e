"""The sub-commands' runners: each takes the parsed arguments, runs the library call and
prints its result; a :class:`~peaksift.errors.PeaksiftError` goes up to
:func:`peaksift.cli.main`, which prints it as one line."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Any

from ._lines import _one_line_warning
from ._summary import _row, _summary

#: True while the console command runs with the garbage collector paused (see cli.run())
_COLLECTOR_PAUSED = [False]


def _imports_done() -> None:
    """After a command's imports: the collector on again, what was imported frozen
    (:func:`peaksift._collector.settle`); nothing unless :func:`peaksift.cli.run` paused it."""
    if _COLLECTOR_PAUSED[0]:
        from .._collector import settle

        _COLLECTOR_PAUSED[0] = False
        settle()


def _config(args: argparse.Namespace) -> Any:
    """The validated config with the command line's execution overrides applied."""
    from ..config import load_config

    cfg = load_config(args.config)
    ov: dict[str, Any] = {}
    if getattr(args, "workers", None) is not None:
        ov["execution__workers"] = args.workers
    if getattr(args, "address", None):
        ov["execution__address"] = args.address
        ov["execution__engine"] = "dask"  # a scheduler address means the Dask engine
    return cfg.with_overrides(**ov) if ov else cfg


def _cmd_inspect(args: argparse.Namespace) -> int:
    from ..events import describe

    print(describe(args.paths if len(args.paths) > 1 else args.paths[0],
                   column_pattern=args.column_pattern))
    return 0


def _cmd_demo(args: argparse.Namespace) -> int:
    from ..simulate import write_demo

    info = write_demo(args.outdir, n_events=args.events, seed=args.seed, weighted=args.weighted,
                      share_folder=args.share_folder)
    print(info["summary"] if isinstance(info, dict) and "summary" in info else info)
    return 0


def _progress_wanted(args: argparse.Namespace) -> bool:
    return not getattr(args, "quiet", False) and sys.stderr.isatty()

def _cmd_search(args: argparse.Namespace) -> int:
    # the figure process first, before the search's modules load: it loads matplotlib and
    # the result modules on the second core meanwhile (the next search adopts it; stopped
    # below when none did: a config error, no figures, a combination's later channels)
    from ..search.parallel import FigureWorker

    FigureWorker.early()
    try:
        return _search_command(args)
    finally:
        FigureWorker.discard_early()


def _search_command(args: argparse.Namespace) -> int:
    import warnings

    from ..search import run_search

    with warnings.catch_warnings(record=True) as caught:
        # numpy's floating-point notices from the statistics layer are counted, not
        # printed one by one in the middle of the progress bars
        warnings.simplefilter("always")
        from ..search.combination import is_combination

        # a combination config names its channels' configs: run_search reads them itself
        config = args.config if is_combination(args.config) else _config(args)
        from .. import events  # noqa: F401  (awkward, pyarrow: every search reads events)

        _imports_done()  # (after the config: its check imports scipy.special, the particles)
        res = run_search(config, out=args.out, unblind=args.unblind, toys=args.toys,
                         seed=args.seed, engine=args.engine, progress=_progress_wanted(args),
                         share_folder=args.share_folder)
    numeric = [w for w in caught if issubclass(w.category, RuntimeWarning)]
    seen: set[str] = set()
    for w in caught:
        if not issubclass(w.category, RuntimeWarning):
            line = _one_line_warning(w.message, w.category)
            if line not in seen:  # the same notice from every chunk is said once
                seen.add(line)
                sys.stderr.write(line)
    if numeric:
        where = sorted({Path(w.filename).name for w in numeric})
        print(f"peaksift: note: {len(numeric)} floating-point warnings (overflow/invalid "
              f"value) in {', '.join(where)} during the run", file=sys.stderr)
    print(_summary(res))
    return 0


def _cmd_spectrum(args: argparse.Namespace) -> int:
    from ..search import run_spectrum

    _imports_done()

    res = run_spectrum(_config(args), out=args.out, engine=args.engine,
                       progress=_progress_wanted(args), share_folder=args.share_folder)
    h = res.histogram
    bl = res.config.blinding
    hidden = (f" outside the blinded window [{bl.window[0]:g}, {bl.window[1]:g}] GeV "
              "(its bins are hidden)" if bl.enabled else "")
    print(f"peaksift spectrum: {h.total():,.6g} candidates in {h.nbins} bins on "
          f"[{h.lo:g}, {h.hi:g}] GeV{hidden} from {res.collected.events_read:,} events")
    for name, path in res.files.items():
        print(f"  {name:<14} {path}")
    return 0


def _cmd_fit(args: argparse.Namespace) -> int:
    from .._format import fit_interval_text
    from ..search import FIT_FILES, run_fit
    from ..search.doubts import fit_doubts

    _imports_done()

    fr = run_fit(_config(args), args.mass, hold_mass=args.hold_mass, out=args.out,
                 engine=args.engine, unblind=args.unblind, progress=_progress_wanted(args),
                 share_folder=args.share_folder)
    print(repr(fr))
    print(_row("mass", f"held at {args.mass:g} GeV" if args.hold_mass
               else f"started at {args.mass:g} GeV"))
    fit = fr.to_dict()
    if not fr.valid:  # as the search's summary says it (README: the "fit status" line)
        print(_row("fit status", "INVALID: " + "; ".join(fr.problems)))
    for label, key, par, unit in (("fitted mass", "peak_mass", "mass", "GeV"),
                                  (f"fitted width ({fr.width_parameter})", "width",
                                   fr.width_parameter, "GeV"),
                                  ("signal yield", "signal_yield", "signal_yield", "")):
        if fr.intervals and par in fr.intervals:
            print(_row(label, fit_interval_text(fit, key, par, unit,
                                                label="profile likelihood")))
    started = f"at the given mass {args.mass:g} GeV" + (" (held there)" if args.hold_mass
                                                          else "")
    for w in fit_doubts(fit, started):  # the invalid fit has its status line above
        if w["topic"] != "fit":
            print(f"  WARNING: {w['message']}")
    if args.out is not None:
        for name in FIT_FILES:
            print(_row("written", str(Path(args.out) / name)))
    return 0


def _demo_config_hook(args: argparse.Namespace) -> None:
    """After ``peaksift demo OUTDIR``: write OUTDIR/search.toml pointing at the new files."""
    from ..search import write_demo_config

    path = write_demo_config(args.outdir)
    if path is not None:
        print(f"config for the search: {path}  (run: peaksift search {path})")
