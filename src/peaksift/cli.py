"""The ``peaksift`` command.

Sub-commands::

    peaksift inspect PATH...        what is in a set of Parquet / Arrow IPC event files
    peaksift demo OUTDIR            write the demo scenario (events, truth, ready config)
    peaksift search CONFIG          the whole search (spectrum, fit, scan, significance, limits, report)
    peaksift spectrum CONFIG        only the selected spectrum: histogram file and figure
    peaksift fit CONFIG --mass M    one signal-plus-background fit started (--hold-mass: held)
                                    at a chosen mass; --out DIR writes fit.json and fit.png

Every sub-command takes ``-q/--quiet`` (no progress bars, warnings only) and
``-v/--verbose`` (log lines of the ``peaksift`` logger: engine, workers, chunks, stage
timings; ``-vv`` for more).  The ones that read events take ``--engine``, ``--workers`` and
``--address`` (a Dask scheduler; implies ``--engine dask``).

A user's mistake (a :class:`~peaksift.errors.PeaksiftError`) prints one line on stderr and
exits with status 2; no traceback.  Ctrl-C exits with 130 and SIGTERM with 143, each after
removing the run's unfinished outputs and stopping its worker processes.  A missing optional
package (the ``distributed`` extra for the Dask engine) is a user's mistake too: the line
names the extra and how to install it.  Warnings print as one ``peaksift: warning:`` line
each, never with a source line.
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Callable, Mapping, Sequence
from pathlib import Path
from typing import Any

from .errors import PeaksiftError

Handler = Callable[[argparse.Namespace], int]


def _config(args: argparse.Namespace) -> Any:
    """The validated config with the command line's execution overrides applied."""
    from .config import load_config

    cfg = load_config(args.config)
    ov: dict[str, Any] = {}
    if getattr(args, "workers", None) is not None:
        ov["execution__workers"] = args.workers
    if getattr(args, "address", None):
        ov["execution__address"] = args.address
        ov["execution__engine"] = "dask"  # a scheduler address means the Dask engine
    return cfg.with_overrides(**ov) if ov else cfg


def _setup_logging(args: argparse.Namespace) -> None:
    """``-v``: INFO lines of the ``peaksift`` logger on stderr; ``-vv``: DEBUG; ``-q``:
    warnings only."""
    import logging

    level = (logging.WARNING if getattr(args, "quiet", False) else
             {0: logging.WARNING, 1: logging.INFO}.get(getattr(args, "verbose", 0),
                                                       logging.DEBUG))
    log = logging.getLogger("peaksift")
    log.setLevel(level)
    if not any(getattr(h, "_peaksift_cli", False) for h in log.handlers):
        h = logging.StreamHandler(sys.stderr)
        h.setFormatter(logging.Formatter("peaksift: %(message)s"))
        h._peaksift_cli = True  # type: ignore[attr-defined]
        log.addHandler(h)
        log.propagate = False
    # other libraries' logged warnings (matplotlib's, say) as one line of ours, like their
    # warnings.warn ones, not Python's bare last-resort line
    root = logging.getLogger()
    if not root.handlers:
        other = logging.StreamHandler(sys.stderr)
        other.setLevel(logging.WARNING)
        other.setFormatter(_OneLine())
        root.addHandler(other)


class _OneLine:
    """Formats a log record as ``peaksift: warning: <message> (<logger>)`` on one line."""

    def format(self, record: Any) -> str:
        text = " ".join(record.getMessage().split())
        return f"peaksift: {record.levelname.lower()}: {text} ({record.name})"


def _one_line_warning(message: Any, category: type, *_: Any, **__: Any) -> str:
    """A warning as the command prints it: one line, no source line."""
    text = " ".join(str(message).split())
    name = "" if category.__module__.startswith("peaksift") else f" ({category.__name__})"
    return f"peaksift: warning: {text}{name}\n"


def _cmd_inspect(args: argparse.Namespace) -> int:
    from .events import describe

    print(describe(args.paths if len(args.paths) > 1 else args.paths[0],
                   column_pattern=args.column_pattern))
    return 0


def _cmd_demo(args: argparse.Namespace) -> int:
    from .simulate import write_demo

    info = write_demo(args.outdir, n_events=args.events, seed=args.seed, weighted=args.weighted,
                      share_folder=args.share_folder)
    print(info["summary"] if isinstance(info, dict) and "summary" in info else info)
    return 0


def _progress_wanted(args: argparse.Namespace) -> bool:
    return not getattr(args, "quiet", False) and sys.stderr.isatty()


def _row(label: str, value: str) -> str:
    return f"  {label:<26} {value}"


def _summary(result: object) -> str:
    """The short table printed at the end of ``peaksift search``."""
    d = result.to_dict()  # type: ignore[attr-defined]
    if d.get("kind") == "combination":
        from .search.combination_report import combination_summary_text

        return combination_summary_text(d)
    text = _summary_text(d)
    sm = d.get("signal_model")
    if sm:  # the scan's signal from simulated samples: say so, and flag a doubtful model
        state = (f"doubtful: {len(sm['notes'])} notes in results.json signal_model.notes"
                 if sm.get("doubtful") else
                 f"closure max {sm.get('max_closure_deviation') or 0:.2f} errors")
        head, _, last = text.rpartition("\n")  # before the closing caution line
        text = (f"{head}\n  signal model               {sm['shape']} from samples "
                f"({state})\n{last}")
    return text


def _summary_text(d: Mapping[str, Any]) -> str:
    """:func:`_summary` from the results dictionary; every number goes through
    :mod:`peaksift._format`, so a missing, NaN or infinite value prints ``n/a``."""
    from ._format import fixed, format_pm, mass_text, number, p_value, significance

    def part(m: Any, key: str) -> Mapping[str, Any]:
        v = m.get(key) if isinstance(m, Mapping) else None
        return v if isinstance(v, Mapping) else {}

    best, fit, inp = part(d, "best"), part(d, "fit"), part(d, "input")
    pm, w, sy = part(fit, "peak_mass"), part(fit, "width"), part(fit, "signal_yield")
    blinded = bool(part(d, "blinding").get("active"))
    lines = ["peaksift search: summary",
             _row("events read", number(inp.get("events_read"))),
             _row("candidates in sidebands" if blinded else "candidates in window",
                  number(inp.get("candidates"))),
             _row("best mass hypothesis", f"{mass_text(best.get('mass'))} GeV")]
    if blinded:  # intended: no fit inside the blinded window, which is not a failure
        lines.append(_row("signal fit", "not made: the run is blinded as configured "
                                        "(--unblind to fit)"))
        sb = d.get("background_fit") or {}
        if sb.get("kind") == "sideband_fit":
            by = sb.get("blinded_yield") or {}
            lines.append(_row("background (sidebands)",
                              f"chi2/ndf = {fixed(sb.get('gof_chi2'), 1)}/{sb.get('gof_ndf')} "
                              f"(p = {p_value(sb.get('gof_p_value'))}); "
                              f"{format_pm(by.get('value'), by.get('error'))} expected in the "
                              "blinded window"))
    else:
        lines += [_row("fitted mass", format_pm(pm.get("value"), pm.get("error"), "GeV")),
                  *_scaled_mass(part(part(d, "systematics"), "fitted_mass")),
                  _row(f"fitted width ({fit.get('width_parameter') or 'width'})",
                       format_pm(w.get("value"), w.get("error"), "GeV")),
                  _row("signal yield", format_pm(sy.get("value"), sy.get("error")))]
    lines += [_row("local significance", significance(best, "local", sigma="sigma")),
              _row("global significance", significance(best, "global", sigma="sigma"))]
    syst = part(d, "systematics")
    if syst:  # best is then the one with systematics; the plain numbers beside it
        plain_best = part(syst, "without_systematics")
        lines[-2] = _row("local significance", significance(best, "local", sigma="sigma")
                         + " with systematics")
        lines[-1] = _row("global significance", significance(best, "global", sigma="sigma")
                         + " with systematics")
        env = part(syst, "envelope")
        lines.append(_row("  without systematics", (
            f"local {significance(plain_best, 'local', sigma='sigma')}, global "
            f"{significance(plain_best, 'global', sigma='sigma')}")))
        if env:
            lines.append(_row("background envelope", ", ".join(env.get("labels") or [])
                              + f" (at the best mass: {part(env, 'best').get('function')})"))
        lines += _limit_lines(part(syst, "limits"), best.get("mass"))
    if not fit.get("valid") and not blinded:
        lines.append(_row("fit status", "INVALID: " + "; ".join(
            str(x) for x in fit.get("problems") or [])))
    _fit_lines(lines, fit)
    km = [k for k in d.get("known_matches") or [] if isinstance(k, Mapping)]
    lines.append(_row("known particles", ", ".join(
        f"{k.get('name')} ({fixed(k.get('distance_sigma'), 1)} sigma)" for k in km)
        or "none match"))
    cal = d.get("calibration")
    if isinstance(cal, Mapping) and cal:
        fm = part(cal, "fitted_mass")
        lines.append(_row(f"calibration {cal.get('particle')}",
                          f"{format_pm(fm.get('value'), fm.get('error'), 'GeV')} vs tables "
                          f"{fixed(cal.get('table_mass'), 4)} GeV (shift "
                          f"{fixed(cal.get('shift_relative_permille'), 1, signed=True)} "
                          "per mille)"))
    if blinded:
        lines.append(_row("blinding", "ACTIVE (data in the blinded window hidden)"))
    lim = d.get("limits") or {}
    if any(lim.get("flags") or []):
        n_toys = sum(1 for f in lim["flags"] if f.startswith("toys"))
        n_bad = sum(bool(x) for x in lim.get("asymptotic_doubtful") or [])
        n_floor = sum(bool(x) for x in lim.get("below_floor") or [])
        lines.append(_row("limits at low counts", f"of {len(lim['flags'])} masses: " + "; ".join(
            s for s in (f"{n_toys} from toys" if n_toys else "",
                        f"{n_bad} asymptotic DOUBTFUL" if n_bad else "",
                        f"{n_floor} below the counting floor" if n_floor else "") if s)
            + " (see the report)"))
    if "outputs" in d:
        lines.append(_row("outputs", str(part(d, "outputs").get("dir"))))
    _doubt_lines(lines, d)
    lines.append("  (a local significance is not a discovery; see the report's caution)")
    return "\n".join(lines)


def _scaled_mass(fm: Mapping[str, Any]) -> list[str]:
    """The fitted mass with the mass scale profiled (``systematics.fitted_mass``)."""
    from ._format import fixed

    if not fm:
        return []
    size = (fm.get("mass_scale") or {}).get("size")
    return [_row("  with mass scale", f"{fixed(fm.get('value'))} +{fixed(fm.get('error_plus'))} "
                 f"-{fixed(fm.get('error_minus'))} GeV (scale uncertainty "
                 f"{fixed(100 * size if size is not None else None, 2)}% profiled)")]


def _limit_lines(lim: Mapping[str, Any], mass: Any) -> list[str]:
    """The observed limit at the limit mass nearest ``mass``, with and without systematics."""
    from ._format import fixed

    w, wo = lim.get("with_systematics"), lim.get("without_systematics")
    if not isinstance(w, Mapping) or not isinstance(wo, Mapping) or not w.get("masses"):
        return []
    ms = [float("inf") if m is None else float(m) for m in w["masses"]]
    try:
        i = min(range(len(ms)), key=lambda j: abs(ms[j] - float(mass)))
    except (TypeError, ValueError):
        return []

    def pair(d: Mapping[str, Any]) -> str:  # two decimals, as the report's limit tables
        return (f"{fixed((d.get('observed') or [None] * (i + 1))[i])} observed, "
                f"{fixed((d.get('expected') or [None] * (i + 1))[i])} expected")

    return [_row(f"limit at {fixed(ms[i])} GeV", f"{pair(w)} {w.get('unit')} with "
                 f"systematics ({pair(wo)} without)")]


def _doubt_lines(lines: list[str], d: Mapping[str, Any]) -> None:
    """One WARNING line per doubt results.json lists (:mod:`peaksift.search.doubts`); the
    invalid main fit already has its ``fit status`` line."""
    for w in d.get("warnings") or []:
        if isinstance(w, Mapping) and w.get("topic") != "fit":
            lines.append(f"  WARNING: {w.get('message')}")


def _fit_lines(lines: list[str], fit: dict) -> None:
    """Give the fitted mass, width and yield lines their profile-likelihood intervals
    (``152.24 +0.50 -0.55 GeV``) where the fit has them, and say what the fit held or
    constrained."""
    from ._format import format_interval
    from .report import fit_settings_text

    iv = fit.get("intervals") or {}
    wname = fit.get("width_parameter") or "width"
    rows = {"fitted mass": ("peak_mass", "mass", "GeV"),
            f"fitted width ({wname})": ("width", wname, "GeV"),
            "signal yield": ("signal_yield", "signal_yield", "")}
    for i, line in enumerate(lines):
        for label, (key, par, unit) in rows.items():
            if line.startswith(_row(label, "")) and par in iv:
                value = (fit.get(key) or {}).get("value")
                lines[i] = _row(label, format_interval(value, *iv[par], unit))
    held = fit_settings_text(fit.get("settings") or {})
    if held:
        at = next((i for i, ln in enumerate(lines) if ln.startswith(_row("signal yield", ""))),
                  len(lines) - 1)
        lines.insert(at + 1, _row("fit settings", held))


def _cmd_search(args: argparse.Namespace) -> int:
    # the figure process first, before the search's modules load: it loads matplotlib and
    # the result modules on the second core meanwhile (the next search adopts it; stopped
    # below when none did: a config error, no figures, a combination's later channels)
    from .search.parallel import FigureWorker

    FigureWorker.early()
    try:
        return _search_command(args)
    finally:
        FigureWorker.discard_early()


def _search_command(args: argparse.Namespace) -> int:
    import warnings

    from .search import run_search

    with warnings.catch_warnings(record=True) as caught:
        # numpy's floating-point notices from the statistics layer are counted, not
        # printed one by one in the middle of the progress bars
        warnings.simplefilter("always")
        from .search.combination import is_combination

        # a combination config names its channels' configs: run_search reads them itself
        config = args.config if is_combination(args.config) else _config(args)
        from . import events  # noqa: F401  (awkward, pyarrow: every search reads events)

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
    from .search import run_spectrum

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
    from ._format import format_interval
    from .search import FIT_FILES, run_fit

    _imports_done()

    fr = run_fit(_config(args), args.mass, hold_mass=args.hold_mass, out=args.out,
                 engine=args.engine, unblind=args.unblind, progress=_progress_wanted(args),
                 share_folder=args.share_folder)
    print(repr(fr))
    print(_row("mass", f"held at {args.mass:g} GeV" if args.hold_mass
               else f"started at {args.mass:g} GeV"))
    fit = fr.to_dict()
    for label, key, par, unit in (("fitted mass", "peak_mass", "mass", "GeV"),
                                  (f"fitted width ({fr.width_parameter})", "width",
                                   fr.width_parameter, "GeV"),
                                  ("signal yield", "signal_yield", "signal_yield", "")):
        if fr.intervals and par in fr.intervals:
            print(_row(label, format_interval(fit[key]["value"], *fr.intervals[par], unit)
                       + "  (profile likelihood)"))
    if args.out is not None:
        for name in FIT_FILES:
            print(_row("written", str(Path(args.out) / name)))
    return 0


def _demo_config_hook(args: argparse.Namespace) -> None:
    """After ``peaksift demo OUTDIR``: write OUTDIR/search.toml pointing at the new files."""
    from .search import write_demo_config

    path = write_demo_config(args.outdir)
    if path is not None:
        print(f"config for the search: {path}  (run: peaksift search {path})")


def _share_opt(q: argparse.ArgumentParser) -> None:
    """The output-folder contract's one switch (see :mod:`peaksift._output`)."""
    q.add_argument("--share-folder", action="store_true",
                   help="write into an output folder that also holds files peaksift did not "
                        "write (they are never touched); without it such a folder is refused")


def build_parser() -> argparse.ArgumentParser:
    from . import __version__

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
    q.set_defaults(handler=_cmd_inspect)

    d = cmd("demo", "write the demo scenario's events, truth file and config",
            "Write the demo scenario: an invented collider run with a Z calibration peak and "
            "one invented resonance, as Parquet files, truth.json and a ready search.toml.",
            [common])
    d.add_argument("outdir", metavar="OUTDIR",
                   help="directory to write into (created; files there are not overwritten)")
    d.add_argument("--events", type=int, default=None, help="number of events (default: demo size)")
    d.add_argument("--seed", type=int, default=None, help="random seed (default: the demo's own)")
    d.add_argument("--weighted", action="store_true", help="simulated-sample variant with weights")
    _share_opt(d)
    d.set_defaults(handler=_cmd_demo)

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
    s.set_defaults(handler=_cmd_search)

    sp = cmd("spectrum", "only the selected spectrum: histogram file and figure",
             "Select, pair and histogram the events of a configuration: spectrum.json and its "
             "figure (and the candidates' pT/rapidity figure), no fit.", [common, engine])
    sp.add_argument("config", metavar="CONFIG", help=config_help)
    sp.add_argument("--out", default=None, help="output directory (default: output.dir)")
    _share_opt(sp)
    sp.set_defaults(handler=_cmd_spectrum)

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
    f.set_defaults(handler=_cmd_fit)
    return p


def main(argv: Sequence[str] | None = None) -> int:
    import warnings

    from ._processes import Terminated, sigterm_as_interrupt, terminated

    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        with sigterm_as_interrupt():  # from the first imports on (~0.5 s of scipy's)
            if args.command not in ("search", "spectrum", "fit"):  # (these import a lot)
                _imports_done()
            else:  # before their modules and configs import it the long way
                from ._lean_imports import scipy_special

                scipy_special()
            _setup_logging(args)
            warnings.formatwarning = _one_line_warning  # type: ignore[assignment]
            rc = int(args.handler(args) or 0)
            if args.command == "demo" and rc == 0:
                _demo_config_hook(args)
        return rc
    except PeaksiftError as exc:
        print("peaksift: error: " + " ".join(str(exc).split()), file=sys.stderr)
        return 2
    except Terminated as stop:
        # SIGTERM (timeout, batch systems): the same clean-up as Ctrl-C, then 128 + 15
        print(_stopped(stop, "terminated (SIGTERM)", "the run's unfinished outputs were "
                       "removed"), file=sys.stderr)
        return 143
    except KeyboardInterrupt as stop:
        print(_stopped(stop, "interrupted", "no outputs were written"), file=sys.stderr)
        return 130
    except BrokenPipeError:
        # the reader of our output left (`peaksift ... | head`): the run's files are written;
        # point stdout at /dev/null so the interpreter's final flush does not fail again
        # (the recipe of Python's `signal` documentation, "Note on SIGPIPE"); 128 + SIGPIPE
        import os

        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 141
    except Exception:
        if not terminated():  # a bug: its traceback is the report
            raise
        # a SIGTERM raised where code turned it into another error (an extension module's
        # import re-raises as ImportError): still the termination it was
        print("peaksift: terminated (SIGTERM); the run's unfinished outputs were removed",
              file=sys.stderr)
        return 143


def _stopped(stop: BaseException, what: str, otherwise: str) -> str:
    """The stop's one line; a stop held over the outputs' moves came after them (_output)."""
    where = getattr(stop, "outputs_in", None)
    return f"peaksift: {what}; " + (f"the outputs were all in place in {where} first"
                                    if where else otherwise)


#: True while the console command runs with the garbage collector paused (see run())
_COLLECTOR_PAUSED = [False]


def _imports_done() -> None:
    """After a command's imports: the collector on again, what was imported frozen
    (:func:`peaksift._collector.settle`); nothing unless :func:`run` paused it."""
    if _COLLECTOR_PAUSED[0]:
        from ._collector import settle

        _COLLECTOR_PAUSED[0] = False
        settle()


def run() -> None:
    """The ``peaksift`` console command and ``python -m peaksift``: :func:`main`, then the
    process ends at once with its exit status.

    The garbage collector is paused while the command imports (:mod:`peaksift._collector`)
    and on again, what was imported frozen, before any data is read (:func:`_imports_done`).

    The exit handlers run as at any exit (logging, multiprocessing, temporary folders) and
    the output streams are flushed; what is skipped is the interpreter's teardown of every
    module and object, which after a search (numba's compiled kernels, the JIT behind them)
    took ~0.5 s on idle cores and over 1 s on loaded ones, after every output was written.
    Calls of :func:`main` from Python (tests, notebooks) return as before."""
    from ._collector import pause

    _COLLECTOR_PAUSED[0] = pause()
    rc = main()
    import atexit
    import os

    if rc in (130, 143):  # stopped, its one line said: what the libraries' exit handlers log
        import logging  # about the abandoned work (asyncio's futures of a local Dask cluster,
        # seen once in a looped test) is no news to the user

        logging.disable(logging.CRITICAL)
    atexit._run_exitfuncs()  # what a normal exit runs first; then the teardown is skipped
    for stream in (sys.stdout, sys.stderr):
        try:
            stream.flush()
        except (OSError, ValueError):  # a closed pipe or stream: nothing left to say there
            pass
    os._exit(rc)


if __name__ == "__main__":  # pragma: no cover
    run()
