"""Running the per-chunk work serially, on local processes or on a Dask cluster.

What is here, and which piece to use when
-----------------------------------------
* :class:`Selection` -- everything one chunk of events needs (collections, cuts, pairing
  options, histogram edges, fit window).  A frozen, picklable value; the search builds it
  from the config, scripts build it by hand.
* :func:`process_chunk` -- the pure per-chunk function: read one chunk, select, pair, fill.
  Returns a :class:`ChunkOutput`.  Call it yourself only to debug one chunk.
* :func:`process_events` -- the same on a chunk already in memory (an awkward array or
  Arrow table from your own Dask collection or reader); :func:`reduce_outputs` adds such
  outputs in chunk order into a :class:`Collected`, bit for bit as :func:`collect` would.
* :func:`collect` -- the whole map-reduce over a dataset, on the engine you choose.  Returns
  a :class:`Collected` (spectrum, candidate masses inside the fit window, cut flow, files
  read and skipped, events read).  This is what :func:`peaksift.run_search` calls.
* :func:`collect_shared` -- :func:`collect` of several selections on one input (the
  channels of a combination): each chunk is read once and every selection runs on it; one
  :class:`Collected` per selection, each exactly what :func:`collect` gives for it alone.
* :func:`map_tasks` -- map any picklable function over a list of task descriptions with the
  same engines, results in task order (so toy batches can run on the same engines).

Engines
-------
``"serial"`` (default)
    In this process, one chunk after another.  Nothing to set up; the reference result.
``"processes"``
    A local pool of ``workers`` processes (:class:`concurrent.futures.ProcessPoolExecutor`).
    :func:`collect` counts this process as one of the ``workers``: it runs chunks itself
    (from the same ordered queue) beside a pool of ``workers - 1``; :func:`map_tasks` uses
    ``workers`` pool processes.
``"dask"``
    A Dask cluster: the ``client`` you pass (a :class:`distributed.Client`, left open), the
    scheduler at ``address`` (``"tcp://host:8786"``), the client current in this process
    (``distributed.get_client()``; said in ``engine_info["note"]``), or else a
    :class:`distributed.LocalCluster` with ``workers`` single-threaded worker processes that
    is started for the call and closed after it.  The file footers are read and checked on
    the workers.  Tasks in flight follow the cluster's threads as workers join or leave;
    results are taken as they complete and reduced in chunk order.  Every worker must run
    the same peaksift version as this process (a worker that differs, also one joining
    later, is refused with an ExecutionError) and be able to open the input paths or URLs.

How local worker processes start (``start_method``)
---------------------------------------------------
``"auto"`` (default) is ``"fork"`` on Linux and ``"spawn"`` elsewhere.  A spawned process
starts a fresh interpreter: imports and numba's first-call set-up cost it about 0.6 s of
CPU before its first chunk, as much as a fifth of a whole 20M-event selection on two cores.
With ``"fork"`` this process first imports the chunk work and loads the pairing kernels,
then forks the pool (or the local Dask cluster's workers), which start ready in a few
milliseconds.  Forking a process that holds threads is safe for what the children run:
peaksift's chunk work or task function (and your cut callables), whose libraries
re-create their thread pools after a fork (Arrow, OpenBLAS) or use none (the numba
kernels), and, on a local Dask cluster, distributed's own worker; the workers reset the
signal handlers and thread counts they inherit.  A forked worker's resident memory counts
the pages it shares with this process, so for a local Dask cluster (whose memory monitor
pauses workers by that figure) ``"auto"`` forks only while this process is below 30% of
each worker's memory limit, and spawns otherwise.  Choose ``"spawn"`` if your own code
in the calling process is not fork-safe.  Scripts that use ``"spawn"`` need the usual
``if __name__ == "__main__":`` guard.  The start method does not change peaksift's results;
a cut callable of yours that reads module state set under that guard sees it only when
forked.

Guarantees
----------
* **Identical results on every engine.**  Chunk outputs are reduced strictly in chunk order
  (results that arrive early wait for their predecessors), so the histogram, the window
  masses (in the same order) and the cut flow are bit for bit the same whichever engine
  ran them.  For unweighted data the bin counts also equal one pass over all events
  exactly; for weighted data a different ``chunk_events`` may change sums at the
  rounding level (floating-point addition is not associative).
* **Bounded memory.**  At most ``2 x workers`` chunks are in flight or waiting to be reduced
  (outputs of chunks this process ran for ``processes`` may wait longer: they hold only
  what the reduce keeps anyway);
  memory grows with the chunk size, not the dataset (plus the window masses, which an
  unbinned fit needs anyway: 16 bytes per candidate in the window).
* **Faults are reported, never hidden.**  A file that cannot be read stops the run with an
  error naming it (a footer that lacks what the selection reads, before any chunk runs); with ``unreadable_files="left_out"`` the whole file is left out (its chunks that
  were already processed are discarded too, so a file counts completely or not at all) and
  listed in :attr:`Collected.files_skipped`.  A worker process that dies raises
  :class:`~peaksift.errors.ExecutionError` naming the chunk; so does a stuck worker of the
  ``processes`` engine or of a local Dask cluster started here (on Linux: the task's
  threads all waiting on a lock, with no CPU used, for ``PEAKSIFT_STALL_SECONDS``, default
  120 s; a slow task is never stopped, see ``peaksift._stall``).  ``KeyboardInterrupt`` stops the workers, closes what was
  started and propagates.

Where things are: ``_chunk.py`` (the map step), ``_shared.py`` (the map step of several
selections on one read), ``_collect.py`` (plan, run, reduce),
``_engines.py`` (engine checks, dispatch, :func:`map_tasks`), ``_local.py`` (serial and
process-pool runners, worker start, dead and stuck workers), ``_dask.py`` (the Dask
engine) with ``_dask_watch.py`` (its stuck tasks).
"""

from __future__ import annotations

from ._chunk import ChunkOutput, Selection, process_chunk, process_events, requirement_flow
from ._collect import (
    DEFAULT_CHUNK_EVENTS,
    Collected,
    SkippedFile,
    collect,
    collect_shared,
    reduce_outputs,
)
from ._engines import ENGINES, START_METHODS, map_tasks

__all__ = [
    "DEFAULT_CHUNK_EVENTS",
    "ENGINES",
    "START_METHODS",
    "ChunkOutput",
    "Collected",
    "Selection",
    "SkippedFile",
    "collect",
    "collect_shared",
    "map_tasks",
    "process_chunk",
    "process_events",
    "reduce_outputs",
    "requirement_flow",
]
