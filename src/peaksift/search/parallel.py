"""Stages of one search that run beside each other, so a run uses the machine's cores.

Which piece when
----------------
* :class:`Beside`       -- one function run in a forked process while this one goes on
  (the asymptotic limits, during the global significance, the systematics and the fits);
  :meth:`Beside.result` returns its value.
* :class:`FigureWorker` -- a forked process, started before the events are read, that
  imports matplotlib while they are read and draws each figure as soon as its results
  exist (:meth:`FigureWorker.draw`); :meth:`FigureWorker.finish` returns the files.  Once
  matplotlib is loaded it forks a second drawer from itself (no second import), and the
  two take the figures one at a time from one queue: the last figures of a run, which wait
  for the statistics, are drawn on both cores.

Both give exactly what the same call in this process gives: the work is deterministic and
its inputs are fixed when it starts (a fork copies them; the figure jobs are pickled).
Nothing is lost when a child fails: whatever it did not deliver is done again here, so a
:class:`~peaksift.errors.PeaksiftError` surfaces with its usual message.  Where forking is
not available or not safe (macOS, Windows; ``_processes.resolve_start_method``), on a
single core, or with ``PEAKSIFT_INLINE=1`` in the environment, everything runs here, in
order.  Warnings a child raises are raised again here, so a caller recording them sees
them all.
"""

from __future__ import annotations

import logging
import os
import sys
import time
import warnings
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

from .._lean_imports import matplotlib_without_set_docs, scipy_special
from .._processes import (
    die_with_parent,
    quiet_fork,
    resolve_start_method,
    signals_held,
    worker_start,
)
from .._stall import LOOK, StallWatch

_log = logging.getLogger("peaksift.search")


def forking() -> bool:
    """Whether stages may run in forked processes here (see the module's guide)."""
    return (not os.environ.get("PEAKSIFT_INLINE") and (os.cpu_count() or 1) > 1
            and resolve_start_method("auto") == "fork")


def cpu_seconds() -> float:
    """User + system CPU time of this process so far (a forked child starts from 0)."""
    import resource

    r = resource.getrusage(resource.RUSAGE_SELF)
    return r.ru_utime + r.ru_stime


def _child_start(parent: int) -> None:
    worker_start()  # Ctrl-C is the parent's to handle: it stops us
    die_with_parent(parent)
    _own_fonts()


def _own_fonts() -> None:
    """Forget the typeset text a fork brought along.  matplotlib's FreeType fonts are not
    fork-safe (its ``font_manager`` says so, and empties its font cache in a forked child),
    but its cache of parsed mathtext keeps glyphs of fonts opened before the fork, whose
    file offset the parent and every other forked drawer share: two drawers typesetting the
    same text at once could read each other's glyph bytes.  A process that drew before the
    search (a notebook, a test session) has filled that cache."""
    mathtext = sys.modules.get("matplotlib.mathtext")  # (not loaded: nothing to forget)
    cache = getattr(getattr(mathtext, "MathTextParser", None), "_parse_cached", None)
    if hasattr(cache, "cache_clear"):
        cache.cache_clear()


def _rewarn(caught: Sequence[tuple[str, type, str, int]]) -> None:
    for message, category, filename, lineno in caught:
        warnings.warn_explicit(message, category, filename, lineno)


def _record(w: warnings.WarningMessage) -> tuple[str, type, str, int]:
    return str(w.message), w.category, w.filename, w.lineno


class Beside:
    """``fn(*args, **kw)`` computed in a forked process from now on; :meth:`result` waits
    for it (or computes it here when no fork was made or the child failed)."""

    def __init__(self, fn: Callable[..., Any], *args: Any, **kw: Any) -> None:
        self._call = (fn, args, kw)
        self._proc: Any = None
        self._conn: Any = None
        self.cpu = 0.0  # CPU seconds the child used (0 when computed here)
        if not forking():
            return
        import multiprocessing

        ctx = multiprocessing.get_context("fork")
        self._conn, child_end = ctx.Pipe(duplex=False)
        self._proc = ctx.Process(target=_beside_child, daemon=True,
                                 args=(child_end, os.getpid(), fn, args, kw))
        with quiet_fork(), signals_held():  # the child unblocks both in worker_start
            self._proc.start()
        child_end.close()

    def ready(self) -> bool:
        """Whether the child has delivered (or died): :meth:`result` would not wait for it.
        False when no child was forked (the value is then computed by :meth:`result`)."""
        return self._proc is not None and bool(self._conn.poll())

    def result(self) -> Any:
        fn, args, kw = self._call
        if self._proc is not None:
            try:
                if not _delivers(self._conn, self._proc.pid):
                    self._proc.terminate()  # stuck: computed here instead
                ok, value, caught, seconds, self.cpu = self._conn.recv()
            except (EOFError, OSError):  # the child died: compute here instead
                ok, value, caught, seconds = False, None, [], 0.0
            self._proc.join()
            self._conn.close()
            self._proc = None
            if ok:
                _log.debug("%s beside: %.2f s", getattr(fn, "__name__", "stage"), seconds)
                _rewarn(caught)
                return value
        return fn(*args, **kw)  # an error here is raised with its own traceback

    def cancel(self) -> None:
        """Stop the child (the caller failed and discards the outputs)."""
        if self._proc is not None:
            self._proc.terminate()
            self._proc.join()
            self._proc = None


def _delivers(conn: Any, pid: int, drawers: bool = False) -> bool:
    """Wait until the child ``pid`` has sent its outcome on ``conn`` (or died): True; False
    when it is stuck (:class:`peaksift._stall.StallWatch`; with ``drawers``, the drawer it
    forked is looked at too), which the caller then stops and does the work itself.  A
    slow child is waited for, however slow."""
    watch = StallWatch()
    if not watch.on:
        return True
    while not conn.poll(LOOK):
        pids = [pid, *(_children(pid) if drawers else ())]
        found = watch.stuck(pids)
        if found is not None:
            _log.warning("a process of this search (pid %d) was stuck for %.0f s, every "
                         "thread of it waiting on a lock with no CPU used; it was stopped and "
                         "its work is done here", *found)
            return False
    return True


def _children(pid: int) -> list[int]:
    """The child processes of ``pid`` (Linux ``/proc/<pid>/task/<pid>/children``)."""
    try:
        with open(f"/proc/{pid}/task/{pid}/children") as f:
            return [int(x) for x in f.read().split()]
    except (OSError, ValueError):
        return []


def _beside_child(conn: Any, parent: int, fn: Callable[..., Any], args: tuple[Any, ...],
                  kw: dict[str, Any]) -> None:
    code = 1
    try:
        _child_start(parent)
        t = time.perf_counter()
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            value = fn(*args, **kw)
        conn.send((True, value, [_record(w) for w in caught], time.perf_counter() - t,
                   cpu_seconds()))
        code = 0
    except BaseException:  # noqa: BLE001 -- the parent computes it again and raises
        _log.debug("stage beside failed; computed again in the parent", exc_info=True)
    finally:
        os._exit(code)  # no atexit handlers or buffers of the parent run twice


class FigureWorker:
    """Draws a search's figures in a forked process as their results arrive.

    ``FigureWorker(outdir, formats=..., log_scale=...)`` forks at once; the child imports
    matplotlib and renders a throw-away figure (fonts, mathtext) while the parent reads the
    events.  :meth:`draw` sends it a job (figure names and the partial
    :class:`~peaksift.search.SearchResult` they need), :meth:`finish` waits for the last
    one and returns figure name -> PNG path.
    """

    def __init__(self, outdir: Path | None, **kw: Any) -> None:
        self.outdir, self.kw = (Path(outdir) if outdir is not None else None), kw
        self.jobs: list[tuple[tuple[str, ...], Any, dict[str, Any]]] = []
        self._proc: Any = None
        self.cpu = 0.0  # CPU seconds the child used
        if not forking():
            return
        import multiprocessing

        ctx = multiprocessing.get_context("fork")
        self._queue = ctx.Queue()  # a feeder thread: draw() never waits for the child
        self._conn, child_end = ctx.Pipe(duplex=False)
        self._proc = ctx.Process(target=_figure_child, daemon=True,
                                 args=(self._queue, child_end, os.getpid(),
                                       tuple(kw.get("formats") or ())))
        with quiet_fork(), signals_held():  # the child unblocks both in worker_start
            self._proc.start()
        child_end.close()

    @classmethod
    def early(cls) -> FigureWorker | None:
        """Fork the figure process now, before the run's folder and options are known (the
        command does so first thing: the process loads matplotlib and the result modules
        while the main line loads its own); the next :meth:`adopt` takes it.  None where
        stages are not forked, and on a busy machine: the early process imports again much
        of what the main line imports, which costs nothing only while a core would idle
        (on a loaded machine the search forks it after its own imports, as it used to)."""
        if not forking() or _EARLY or os.getloadavg()[0] > (os.cpu_count() or 1):
            return None
        _job_modules()  # (the search imports them too: the process inherits them instead)
        _EARLY.append(cls(None))
        return _EARLY[0]

    @classmethod
    def adopt(cls, outdir: Path, **kw: Any) -> FigureWorker:
        """The worker :meth:`early` forked, now drawing into ``outdir`` with ``kw``; else a
        new one forked now."""
        if _EARLY:
            worker = _EARLY.pop()
            worker.outdir, worker.kw = Path(outdir), kw
            return worker
        return cls(outdir, **kw)

    @classmethod
    def discard_early(cls) -> None:
        """Stop the worker :meth:`early` forked if no search adopted it."""
        while _EARLY:
            _EARLY.pop().cancel()

    def draw(self, names: Sequence[str], result: Any, **extra: Any) -> None:
        """Draw the figures ``names`` of ``result`` (``extra``: more keywords of
        :func:`~peaksift.plotting.search_figures`, e.g. ``calibration``); one job per
        figure, so that the two drawers share them.  ``result`` is pickled: the figure
        process has the modules of the results it carries, not the search's."""
        for name in names:
            job = ((name,), result, extra)
            if self._proc is not None:
                self._queue.put((len(self.jobs), *job, self.outdir, self.kw))
            self.jobs.append(job)

    def finish(self) -> dict[str, Path]:
        """Wait for every figure; draw here whatever the child did not deliver."""
        drawn: dict[str, str] = {}
        done: set[int] = set()
        if self._proc is not None:
            for _ in range(_DRAWERS):  # one end mark per drawer
                self._queue.put(None)
            try:
                if not _delivers(self._conn, self._proc.pid, drawers=True):
                    self._proc.terminate()  # stuck: everything is drawn here (the second
                    # drawer ends with the first, die_with_parent)
                drawn, done, caught, self.cpu = self._conn.recv()
            except (EOFError, OSError):  # the child died: everything is drawn here
                drawn, done, caught = {}, set(), []
            self._proc.join()
            # a drawer that died early leaves jobs in the queue: nobody will read them, and
            # its feeder thread must not hold this process's exit on a full pipe
            self._queue.cancel_join_thread()
            _rewarn(caught)
            self._conn.close()
            self._proc = None
        out = {k: Path(v) for k, v in drawn.items()}
        from .. import plotting

        for i, (names, result, extra) in enumerate(self.jobs):
            if i not in done:
                out.update(plotting.search_figures(result, self.outdir, names=names,
                                                   **self.kw, **extra))
        return out

    def cancel(self) -> None:
        """Stop the child (the caller failed and discards the outputs)."""
        if self._proc is not None:
            self._queue.cancel_join_thread()  # nobody will read what is still queued
            self._proc.terminate()
            self._proc.join()
            self._proc = None


def _warm_up(formats: Sequence[str] = ()) -> None:
    """Import the drawing stack and render one small figure with typeset text, so the
    first real figure does not pay for loading fonts and the mathtext parser; saved once in
    each of ``formats`` too, so that their backends (the PDF one loads fontTools, ~0.25 s)
    are in before the second drawer forks, not imported by each drawer.

    The run's own expressions are not typeset here in advance: laid out in this shared
    parser at the figures' resolution, some were later drawn with overlapping glyphs (a
    tick label "60" as a "6" over a "0"), and the time it saved was within the noise.
    Nor is text measured as a path here (``_annotations.text_width``, the value tables): a path
    layout of typeset text keeps its FreeType fonts in matplotlib's cache, a forked drawer
    would share their file offsets with this one, and two drawers reading glyphs at once
    could read each other's (matplotlib reopens only the fonts of its font cache in a
    forked child).  A second drawer forked after a drawn figure lost one in a loaded test
    run (it was drawn again by the parent)."""
    import io

    from .._style import figure_style, new_figure

    fig, ax = new_figure((2.0, 1.5))
    with figure_style():
        ax.plot([0, 1], [0, 1])
        ax.set_xlabel(r"$m_{\mu\mu}$ [GeV]")
        ax.set_title(r"$Z_{local}$ = 1.00 $\sigma$")
    for fmt in dict.fromkeys(["png", *formats]):
        fig.savefig(io.BytesIO(), format=fmt, dpi=50)


def _job_modules() -> None:
    """Import what a figure job needs: the modules of the results it carries (unpickling a
    job imports them: the histogram, the fit, scan and limit results; none of them loads
    the config, the events' modules or numba: a job's fit results come without their cost
    functions, ``search.run._drawn``) and the fit figure's.  Done once, before the second
    drawer forks, instead of by each drawer at its first job."""
    from .. import histogram  # noqa: F401
    from ..fitting import figure, result  # noqa: F401
    from ..stats import limit_result, scan_result  # noqa: F401


_EARLY: list[FigureWorker] = []  # the worker FigureWorker.early forked, until adopted


#: processes drawing a search's figures: the first forks the others once matplotlib is in
_DRAWERS = 2


def _draw_jobs(queue: Any, drawn: dict[str, str], done: set[int],
               caught: list[tuple[str, type, str, int]]) -> None:
    """Draw jobs from ``queue`` until its end mark; a failed job is left to the parent."""
    from .. import plotting

    while (job := queue.get()) is not None:
        i, names, result, extra, outdir, kw = job
        try:
            with warnings.catch_warnings(record=True) as seen:
                warnings.simplefilter("always")
                made = plotting.search_figures(result, outdir, names=names, **kw, **extra)
            caught += [_record(w) for w in seen]
            drawn.update({k: str(v) for k, v in made.items()})
            done.add(i)
        except Exception:  # noqa: BLE001 -- the parent draws it again and raises
            _log.debug("figures %s failed; drawn again in the parent", names, exc_info=True)


def _second_drawer(queue: Any) -> tuple[int, Any] | None:
    """Fork another drawer from this one (matplotlib loaded and warmed up); returns its
    ``(pid, connection)`` for :func:`_join_drawer`, None when the fork failed."""
    import multiprocessing

    receive, send = multiprocessing.Pipe(duplex=False)
    me = os.getpid()
    try:
        with quiet_fork():
            pid = os.fork()
    except OSError:
        return None
    if pid:
        send.close()
        return pid, receive
    code = 1  # the second drawer from here on: it ends in os._exit
    drawn: dict[str, str] = {}
    done: set[int] = set()
    caught: list[tuple[str, type, str, int]] = []
    try:
        receive.close()
        die_with_parent(me)
        _own_fonts()
        if queue.empty():  # its own fonts opened and its parser's first layouts made
            _warm_up()  # while the events are still read, not in its first figure (~0.07 s)
        _draw_jobs(queue, drawn, done, caught)
        code = 0
    except BaseException:  # noqa: BLE001 -- the main process draws what was not delivered
        _log.debug("second figure process stopped", exc_info=True)
    finally:
        try:
            send.send((drawn, done, caught, cpu_seconds()))
        finally:
            os._exit(code)


def _join_drawer(helper: tuple[int, Any], drawn: dict[str, str], done: set[int],
                 caught: list[tuple[str, type, str, int]]) -> float:
    """Add what the second drawer delivered; returns its CPU seconds."""
    pid, conn = helper
    cpu = 0.0
    try:
        d, dn, cg, cpu = conn.recv()
        drawn.update(d)
        done.update(dn)
        caught += cg
    except (EOFError, OSError):  # it died: its figures are drawn in the main process
        pass
    conn.close()
    os.waitpid(pid, 0)
    return cpu


def _figure_child(queue: Any, conn: Any, parent: int, formats: Sequence[str]) -> None:
    code = 1
    drawn: dict[str, str] = {}
    done: set[int] = set()
    caught: list[tuple[str, type, str, int]] = []
    helpers: list[tuple[int, Any]] = []
    try:
        _child_start(parent)
        from .._collector import pause, settle

        # matplotlib's import and the warm-up make ~0.2 million objects and no garbage worth
        # a collection: the collector waits until they are in, then they are frozen (the
        # second drawer inherits them so)
        pause()  # (already off in a worker forked at the command's start)
        scipy_special()  # (the result modules' and the fit figure's, the short way)
        with matplotlib_without_set_docs():  # (~0.1 s of docstrings nobody reads here)
            from .. import plotting  # noqa: F401  (loaded before the second drawer forks)

            _warm_up(formats)  # (an early worker does not know them: PNG only)
            _job_modules()
        settle()  # on again in this process of ours, its imports frozen
        for _ in range(_DRAWERS - 1):
            if (h := _second_drawer(queue)) is not None:
                helpers.append(h)
        _draw_jobs(queue, drawn, done, caught)
        code = 0
    except BaseException:  # noqa: BLE001 -- the parent draws what was not delivered
        _log.debug("figure process stopped", exc_info=True)
    finally:
        try:
            cpu = cpu_seconds() + sum(_join_drawer(h, drawn, done, caught) for h in helpers)
            conn.send((drawn, done, caught, cpu))
        finally:
            os._exit(code)
