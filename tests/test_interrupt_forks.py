"""Ctrl-C around the forks of worker processes, and a Ctrl-C lost where Python drops
exceptions, seen from the command line.

Outside references: POSIX ``fork(2)`` and ``pthread_sigmask(3)`` (a forked child inherits
its parent's signal handlers and mask; a blocked signal stays pending until unblocked, and
a pending signal whose action is set to ignore is discarded, ``sigaction(2)``); the
terminal sends Ctrl-C's SIGINT to every process of the foreground process group (POSIX
General Terminal Interface, "Special Characters"); Python's data model (``__del__``: the
exceptions it raises are ignored) and the shell convention of exit status 128 + 2 after
SIGINT.
"""

from __future__ import annotations

import multiprocessing
import os
import signal
import sys
import time

import pytest

from peaksift import _processes
from peaksift._processes import process_pool, quiet_fork, signals_held, stop_pool

pytestmark = [pytest.mark.skipif(not sys.platform.startswith("linux"), reason="forks"),
              pytest.mark.usefixtures("python_ctrl_c")]


def _sleep(seconds: float) -> float:
    time.sleep(seconds)
    return seconds


def test_ctrl_c_while_a_pool_forks_is_raised_once_every_worker_is_listed(monkeypatch):
    """A Ctrl-C that comes right after a worker's fork, before the pool has listed it, is
    raised when the submit returns: every worker started is on the pool's list, so the
    stop ends them all (before, one was left running its task, outside the list)."""
    import multiprocessing.process as mp

    start = mp.BaseProcess.start
    forked: list[int] = []

    def start_then_ctrl_c(self):
        start(self)
        forked.append(self.pid)
        os.kill(os.getpid(), signal.SIGINT)  # Ctrl-C lands here, before the listing
        sum(range(10_000))  # bytecode where Python's handler would raise

    pool = process_pool(2, "fork")
    monkeypatch.setattr(mp.BaseProcess, "start", start_then_ctrl_c)
    listed: dict = {}
    try:
        with pytest.raises(KeyboardInterrupt), quiet_fork():
            try:
                pool.submit(_sleep, 30.0)
            finally:
                listed = dict(pool._processes or {})
    finally:
        monkeypatch.setattr(mp.BaseProcess, "start", start)
        procs = dict(listed)
        stop_pool(pool, procs)
    assert len(forked) == 2 and set(forked) <= set(listed)
    # the pool's own thread reaps its workers too: a Process it reaped a moment ago can
    # still read as alive here (waitpid(2) gave us ECHILD), so wait until the records agree
    deadline = time.monotonic() + 10.0
    while any(p.is_alive() for p in procs.values()) and time.monotonic() < deadline:
        time.sleep(0.05)
    assert all(not p.is_alive() for p in procs.values())


def _child_sets_up_late(delay: float) -> None:
    time.sleep(delay)  # the window between the fork and the child's own signal set-up
    _processes.worker_start()
    time.sleep(0.3)  # a Ctrl-C held since the fork would be raised here, were it not ignored


def test_a_child_sent_ctrl_c_before_its_signal_setup_carries_on():
    """A child forked under ``signals_held`` starts with SIGINT blocked; ``worker_start``
    ignores it, then unblocks it, so a Ctrl-C that reached the child before (the whole
    foreground group gets it) is discarded: the child ends normally (exit code 0), where
    without the block it would raise KeyboardInterrupt in the copy of this stack and exit 1
    with a traceback."""
    ctx = multiprocessing.get_context("fork")
    proc = ctx.Process(target=_child_sets_up_late, args=(0.5,), daemon=True)
    with quiet_fork(), signals_held():
        proc.start()
    os.kill(proc.pid, signal.SIGINT)  # long before the child's worker_start
    proc.join(timeout=60)
    assert proc.exitcode == 0


class _CtrlCOnDelete:
    def __del__(self) -> None:
        os.kill(os.getpid(), signal.SIGINT)
        sum(range(10_000))


def test_ctrl_c_lost_in_a_del_still_ends_the_command_with_one_line(monkeypatch, capsys):
    """A Ctrl-C whose KeyboardInterrupt Python drops (raised in a ``__del__``) ends the
    command as any Ctrl-C: exit status 130 and the one line, no "Exception ignored"
    traceback, the rest of the command not run."""
    from peaksift import cli

    ran_on: list[bool] = []

    def command(args) -> int:
        obj = _CtrlCOnDelete()
        del obj
        t0 = time.monotonic()
        while time.monotonic() - t0 < 2.0:
            pass
        ran_on.append(True)
        return 0

    monkeypatch.setattr(cli, "_cmd_inspect", command)
    rc = cli.main(["inspect", "nothing.parquet"])
    err = capsys.readouterr().err
    assert rc == 130 and not ran_on
    assert [x for x in err.splitlines() if x.strip()] == [
        "peaksift: interrupted; no outputs were written"], err


def test_ctrl_c_during_the_commands_first_imports_is_one_line(monkeypatch, capsys):
    """A Ctrl-C while the command imports its libraries (scipy's ~0.5 s, before any work)
    ends it like any Ctrl-C: exit status 130 and the one line, no traceback (seen: a
    traceback through scipy's import when Ctrl-C came 0.5 s after the start)."""
    from peaksift import _lean_imports, cli

    def interrupted_import() -> None:
        os.kill(os.getpid(), signal.SIGINT)
        sum(range(10_000))  # bytecode where Python's handler raises

    monkeypatch.setattr(_lean_imports, "scipy_special", interrupted_import)
    rc = cli.main(["spectrum", "no-such.toml"])
    err = capsys.readouterr().err
    assert rc == 130 and [x for x in err.splitlines() if x.strip()] == [
        "peaksift: interrupted; no outputs were written"], err


_STOPPED_THEN_LOGGED = """
import atexit, logging, sys
sys.argv = ["peaksift", "inspect", "nothing.parquet"]
from peaksift import cli
from peaksift._processes import Terminated

def command(args):
    # what a library's exit handler does after an abandoned Dask cluster: log an error
    atexit.register(lambda: logging.getLogger("asyncio").error(
        "Future exception was never retrieved"))
    raise Terminated

cli._cmd_inspect = command
cli.run()
"""


def test_a_stopped_command_says_one_line_whatever_exit_handlers_log(tmp_path):
    """After SIGTERM the command ends with status 143 (128 + 15, POSIX sh(1)) and its one
    line; an error a library logs from its exit handler (asyncio's note on a future of the
    abandoned cluster, seen once in a looped run) is not printed after it."""
    import subprocess
    from pathlib import Path

    src = str(Path(__file__).resolve().parents[1] / "src")
    done = subprocess.run([sys.executable, "-c", _STOPPED_THEN_LOGGED], capture_output=True,
                          text=True, timeout=300, env={**os.environ, "PYTHONPATH": src},
                          cwd=tmp_path, check=False)
    assert done.returncode == 143, done.stderr
    assert [x for x in done.stderr.splitlines() if x.strip()] == [
        "peaksift: terminated (SIGTERM); the run's unfinished outputs were removed"], done.stderr
