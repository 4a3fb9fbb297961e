"""The Dask engine: a local cluster started for the call, or a running scheduler."""

from __future__ import annotations

import contextlib
import uuid
from collections.abc import Callable, Sequence
from typing import Any

from .._processes import arrow_threads_from_env, quiet_fork, resolve_start_method
from ..errors import ExecutionError, PeaksiftError
from ._local import (
    _INFLIGHT_PER_WORKER,
    _dead_worker_error,
    _install_exit_fast,
    _Run,
)

#: A forked worker's resident memory includes the pages it shares with this process, and
#: Dask's memory monitor pauses (80%) or restarts (95%) a worker by that figure.  ``"auto"``
#: forks a local cluster's workers only while this process is below this fraction of each
#: worker's memory limit (LocalCluster's default: the memory available to this process,
#: cgroup limits included, over the workers), leaving the rest for the chunk work (~0.4 GiB
#: per worker at the default chunk size).
_FORK_RSS_FRACTION = 0.3


def _local_cluster_method(start_method: str, workers: int) -> str:
    """How a local cluster's workers start: ``start_method`` resolved, except that
    ``"auto"`` spawns when this process is too large to fork (see ``_FORK_RSS_FRACTION``)."""
    method = resolve_start_method(start_method)
    if start_method != "auto" or method != "fork":
        return method
    try:
        import psutil  # comes with distributed
        from distributed.system import MEMORY_LIMIT
    except ImportError:  # pragma: no cover
        return "spawn"
    per_worker = MEMORY_LIMIT / max(1, workers)
    rss = psutil.Process().memory_info().rss
    return "fork" if rss < _FORK_RSS_FRACTION * per_worker else "spawn"


#: the one line a user without the optional extra sees (the README says the same)
MISSING_DASK = ("engine 'dask' needs the optional 'distributed' extra (the dask and "
                "distributed packages), which is not installed: pip install "
                "'peaksift[distributed]' (from a checkout: pip install '.[distributed]'), or "
                "use engine 'serial' or 'processes'")


def require_dask() -> None:
    """Raise :class:`ExecutionError` naming the extra when dask/distributed are missing."""
    try:
        import dask  # noqa: F401
        import distributed  # noqa: F401
    except ImportError:
        raise ExecutionError(MISSING_DASK) from None


def _local_worker_setup() -> None:
    """Run on every worker of a local cluster we start: a fast exit, and Arrow's thread
    count from the environment (a forked worker inherits this process's pool size)."""
    _install_exit_fast()
    arrow_threads_from_env()


def _start_local_cluster(workers: int, start_method: str = "auto") -> Any:
    """A LocalCluster of ``workers`` single-threaded processes, quiet, no dashboard.

    The nannies start their workers with ``start_method`` (``"auto"``: fork on Linux when
    this process is small, see :func:`_local_cluster_method` and the module guide): forked
    from this process, a worker starts with distributed, the chunk work and its kernels
    already loaded.

    Dask's nannies start workers with ``MALLOC_TRIM_THRESHOLD_=65536``, which makes glibc
    return freed memory to the system at once: every large temporary array of a chunk is
    then mapped afresh, page by page (measured here: ~9x the page faults and ~40% more CPU
    per chunk).  Workers of the clusters we start keep the default allocator behaviour.
    Their statistical profiler (a thread sampling the running task every 10 ms, for the
    dashboard) is off too, since these clusters have no dashboard (~5% of a chunk's CPU), and
    the diagnostic event-loop tick (every 20 ms) and system monitor (every 0.5 s) run once a
    second and every ten: on two cores the scheduler's and workers' housekeeping competes
    with the chunks (measured: ~0.1 s of a 2.3 s run).
    """
    import logging

    import dask
    from distributed import LocalCluster

    env = dict(dask.config.get("distributed.nanny.pre-spawn-environ", {}) or {})
    env.pop("MALLOC_TRIM_THRESHOLD_", None)
    method = _local_cluster_method(start_method, workers)
    with dask.config.set({"distributed.nanny.pre-spawn-environ": env,
                          "distributed.worker.multiprocessing-method": method,
                          "distributed.worker.profile.enabled": False,
                          "distributed.admin.tick.interval": "1s",
                          "distributed.admin.system-monitor.interval": "10s"}), quiet_fork():
        # dashboard off; the scheduler's small HTTP endpoint takes a free port, not 8787
        return LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                            dashboard_address=None, silence_logs=logging.ERROR,
                            scheduler_kwargs={"dashboard": False, "dashboard_address": ":0"})


def _connect(address: str | None, workers: int, timeout: str = "30s",
             start_method: str = "auto") -> tuple[Any, Any]:
    """Return (client, cluster_we_started_or_None)."""
    require_dask()
    from distributed import Client
    if address is None:
        cluster = _start_local_cluster(workers, start_method)
        try:
            client = Client(cluster, set_as_default=False)
            client.run(_local_worker_setup)  # our own workers only, never a user's cluster
            return client, cluster
        except BaseException:
            cluster.close()
            raise
    try:
        return Client(address, set_as_default=False, timeout=timeout), None
    except (OSError, TimeoutError) as exc:
        raise ExecutionError(
            f"cannot connect to the Dask scheduler at {address!r} ({type(exc).__name__}: "
            f"{exc}); check the address and that the scheduler is running, or leave the "
            "address unset to start a local cluster"
        ) from None


def _dask_threads(client: Any) -> int:
    try:
        info = client.scheduler_info()
        return max(1, sum(int(w.get("nthreads", 1)) for w in info.get("workers", {}).values()))
    except (KeyError, TypeError, AttributeError, OSError):  # pragma: no cover
        return 1


def _run_dask(func: Callable[[Any], Any], tasks: Sequence[Any], workers: int,
              address: str | None, describe: Callable[[int], str], info: dict[str, Any],
              method: str) -> _Run:
    require_dask()
    from distributed import KilledWorker

    n = len(tasks)
    client, cluster = _connect(address, workers, start_method=method)
    pending: dict[int, Any] = {}
    try:
        threads = _dask_threads(client)
        info["workers"] = threads
        info["address"] = address if address is not None else cluster.scheduler_address
        limit = _INFLIGHT_PER_WORKER * threads
        token = uuid.uuid4().hex[:12]
        nxt = 0
        for i in range(n):
            while nxt < n and nxt < i + limit:
                pending[nxt] = client.submit(func, tasks[nxt], key=f"peaksift-{token}-{nxt}",
                                             pure=False)
                nxt += 1
            fut = pending.pop(i)
            try:
                value = fut.result()
            except PeaksiftError as exc:
                yield i, False, exc
                continue
            except KilledWorker as exc:
                # tasks queued on the same worker may have failed with it; name them too
                also = [j for j, f in pending.items() if f.status == "error"]
                detail = f"KilledWorker: {exc}" + (
                    f" (tasks {', '.join(map(str, also))} failed with it)" if also else "")
                raise _dead_worker_error(
                    "Dask worker", i, n, describe, [i, *pending], detail,
                    "the worker process running it was killed or crashed (out of memory?): "
                    "lower chunk_events, or run engine='serial' to see the underlying error",
                ) from None
            except ModuleNotFoundError as exc:
                if "peaksift" in str(exc):
                    raise ExecutionError(
                        f"the Dask workers cannot import peaksift ({exc}); install the same "
                        "peaksift version in every worker's environment"
                    ) from None
                raise
            finally:
                fut.release()
            yield i, True, value
    finally:
        if pending:
            with contextlib.suppress(OSError, RuntimeError, TimeoutError):  # scheduler gone
                client.cancel(list(pending.values()))
        client.close()
        if cluster is not None:
            cluster.close()
