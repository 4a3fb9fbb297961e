"""Choosing the engine: checks, the dispatch to a runner, and :func:`map_tasks`."""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any

from .._processes import resolve_start_method
from ..errors import ConfigError
from ._dask import DaskSession, _current_client, _local_cluster_method, _run_dask, require_dask
from ._local import (
    _check_picklable,
    _default_workers,
    _prepare_to_fork,
    _Run,
    _run_processes,
    _run_processes_helping,
    _run_serial,
)

ENGINES = ("serial", "processes", "dask")


#: How local worker processes start (see the module guide).
START_METHODS = ("auto", "fork", "spawn")


def _check_engine(engine: str, workers: int | None, address: str | None,
                  start_method: str = "auto") -> None:
    from ..errors import closest

    for what, value, allowed in (("engine", engine, ENGINES),
                                 ("start_method", start_method, START_METHODS)):
        if value not in allowed:
            near = closest(str(value), allowed)
            hint = f"; did you mean {near!r}?" if near else ""
            raise ConfigError(
                f"unknown {what} {value!r}: choose one of {', '.join(allowed)}{hint}"
            )
    if workers is not None and (isinstance(workers, bool) or int(workers) != workers
                                or workers < 1):
        raise ConfigError(f"workers must be a positive integer, got {workers!r}")


def _run(func: Callable[[Any], Any], tasks: Sequence[Any], *, engine: str,
         workers: int | None, address: str | None, describe: Callable[[int], str],
         info: dict[str, Any], parent_helps: bool = False,
         start_method: str = "auto", client: Any = None, session: Any = None) -> _Run:
    n_workers = workers or _default_workers()
    address = address or None  # "" (the config's default) means: start a local cluster
    if engine != "dask":
        address = None  # only Dask connects to a scheduler
    info.update(engine=engine, workers=1 if engine == "serial" else n_workers, address=address)
    if engine == "serial":
        return _run_serial(func, tasks)
    if engine == "dask":
        require_dask()  # one line naming the extra, before anything else is started
    method = resolve_start_method(start_method)
    if engine == "dask" and (client is not None or session is not None):
        return _run_dask(func, tasks, n_workers, address, describe, info, method, client,
                         session)
    if engine == "dask" and address is None:
        if _current_client() is not None:  # a user's cluster: nothing of ours to fork
            return _run_dask(func, tasks, n_workers, None, describe, info, method)
        method = _local_cluster_method(start_method, n_workers)
    if address is None:  # we start the worker processes
        info["start_method"] = method
        if method == "fork":
            _prepare_to_fork(func)
    if engine == "processes":
        if parent_helps and n_workers > 1 and len(tasks) > 1:
            return _run_processes_helping(func, tasks, n_workers, describe, method)
        return _run_processes(func, tasks, n_workers, describe, method)
    return _run_dask(func, tasks, n_workers, address, describe, info, method)


def _open_dask_session(func: Any, workers: int | None, address: str | None, client: Any,
                       start_method: str, info: dict[str, Any]) -> Any:
    """A :class:`DaskSession` for several runs (the plan, then the chunks): the client given,
    the address, the current client, or a local cluster started as :func:`_run` would."""
    n_workers = workers or _default_workers()
    address = address or None
    info.update(engine="dask", workers=n_workers, address=address)
    method = resolve_start_method(start_method)
    if client is None and address is None and _current_client() is None:
        method = _local_cluster_method(start_method, n_workers)
        info["start_method"] = method
        if method == "fork":
            _prepare_to_fork(func)
    return DaskSession(address, client, n_workers, method, info)


def _progress(total: int, desc: str, unit: str, enabled: bool) -> Any:
    from .._progress import bar

    return bar(total, shown=enabled, desc=desc, unit=unit, unit_scale=True, leave=False)


def map_tasks(func: Callable[[Any], Any], specs: Sequence[Any], *, engine: str = "serial",
              workers: int | None = None, address: str | None = None,
              progress: bool = False, desc: str = "tasks",
              start_method: str = "auto", client: Any = None) -> list[Any]:
    """Apply ``func`` to every task description, on the chosen engine; results in order.

    Parameters
    ----------
    func : callable
        A picklable (module-level) function of one argument, e.g.
        ``peaksift.stats.toys.run_toy_batch``.  It should be pure: the same spec gives the
        same result wherever it runs (seed random numbers from the spec).
    specs : sequence
        Picklable task descriptions.
    engine, workers, address, start_method, client
        As for :func:`collect`.
    progress : bool
        Show a progress bar (one step per finished task).
    desc : str
        Label of the progress bar and of error messages.

    Returns
    -------
    list
        ``[func(s) for s in specs]``, whichever engine computed it.

    Raises
    ------
    ExecutionError
        A worker died (the message names the task), or ``func`` cannot be pickled.
    PeaksiftError
        The first error a task raised, in task order.
    """
    specs = list(specs)
    _check_engine(engine, workers, address, start_method)
    if not specs:
        return []
    if engine == "processes":
        _check_picklable(func, f"the function {getattr(func, '__name__', func)!r}")

    def describe(i: int) -> str:
        text = repr(specs[i])
        return f"{desc.removesuffix('s')} {i} ({text[:120]})"

    info: dict[str, Any] = {}
    out: list[Any] = []
    bar = _progress(len(specs), desc, "task", progress)
    run = None
    try:
        run = _run(func, specs, engine=engine, workers=workers, address=address,
                   describe=describe, info=info, start_method=start_method, client=client)
        for _, ok, value in run:
            if not ok:
                raise value
            out.append(value)
            bar.update(1)
    finally:
        if run is not None:
            run.close()  # stop the workers now, not when the traceback is freed
        bar.close()
    return out
