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
from collections.abc import Sequence

from ..errors import PeaksiftError
from . import _parser

# The package's parts: _parser (the options), _commands (the runners), _summary (the
# search's closing table), _lines (log and warning lines, the stop line).  The names below
# are what this module uses, and stay importable from here as cli._summary, cli._stopped...
from ._commands import _COLLECTOR_PAUSED as _COLLECTOR_PAUSED
from ._commands import _cmd_demo as _cmd_demo
from ._commands import _cmd_fit as _cmd_fit
from ._commands import _cmd_inspect as _cmd_inspect
from ._commands import _cmd_search as _cmd_search
from ._commands import _cmd_spectrum as _cmd_spectrum
from ._commands import _config as _config
from ._commands import _demo_config_hook as _demo_config_hook
from ._commands import _imports_done as _imports_done
from ._lines import _one_line_warning as _one_line_warning
from ._lines import _setup_logging as _setup_logging
from ._lines import _stopped as _stopped
from ._summary import _summary as _summary
from ._summary import _summary_text as _summary_text


def build_parser() -> argparse.ArgumentParser:
    """The command's parser, each sub-command tied to its runner as this module holds it
    (looked up at every call: a test may replace ``cli._cmd_inspect``)."""
    return _parser.build({"inspect": _cmd_inspect, "demo": _cmd_demo, "search": _cmd_search,
                          "spectrum": _cmd_spectrum, "fit": _cmd_fit})


def main(argv: Sequence[str] | None = None) -> int:
    import warnings

    from .._processes import Terminated, sigterm_as_interrupt, terminated

    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        with sigterm_as_interrupt():  # from the first imports on (~0.5 s of scipy's)
            if args.command not in ("search", "spectrum", "fit"):  # (these import a lot)
                _imports_done()
            else:  # before their modules and configs import it the long way
                from .._lean_imports import scipy_special

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
    from .._collector import pause

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
