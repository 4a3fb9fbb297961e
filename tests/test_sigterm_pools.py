"""SIGTERM and the execution engine's worker pool: whenever it comes (before the pool, while
its workers are being forked, while they work), ``peaksift search --engine processes`` ends
with no process of its own left, exit status 143 (or the default action's -15 before
peaksift has set its handler up, when nothing has been written yet), one line on stderr and
no traceback, and nothing half-written in the output folder.

Outside references: POSIX ``fork(2)``/``sigaction(2)``/``pthread_sigmask(3)`` (a forked
child inherits its parent's handlers and signal mask; a process-directed signal goes to any
thread that does not block it) and the shell convention of 128 + signal number for a
process ended by a signal (POSIX ``wait(2)`` status, ``sh(1)``).  Processes are found
through ``/proc/<pid>/stat`` (Linux ``proc(5)``: field 6 is the session id).
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest

from peaksift._processes import Terminated, process_pool, sigterm_as_interrupt, sigterm_held

REPO = Path(__file__).resolve().parents[1]
LINE = "peaksift: terminated (SIGTERM); the run's unfinished outputs were removed"

pytestmark = pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc")


def _session(sid: int) -> dict[int, tuple[int, str]]:
    """pid -> (parent pid, state) of every live process in session ``sid`` (proc(5))."""
    out = {}
    for d in os.listdir("/proc"):
        if not d.isdigit():
            continue
        try:
            text = Path(f"/proc/{d}/stat").read_text()
        except OSError:
            continue
        f = text[text.rindex(")") + 2:].split()
        if int(f[3]) == sid and f[0] != "Z":  # a zombie has ended; init reaps it
            out[int(d)] = (int(f[1]), f[0])
    return out


@pytest.fixture(scope="module")
def config(demo_dir, tmp_path_factory):
    """The demo search on the process engine: small chunks (several tasks per worker) and
    many toys, so the run is still going whenever the signal comes."""
    text = (demo_dir / "search.toml").read_text()
    d = tmp_path_factory.mktemp("term")
    path = d / "search.toml"
    text = text.replace('files = ["events_*.parquet"]',
                        f'files = ["{demo_dir}/events_*.parquet"]').replace(
        '"background_template.json"', f'"{demo_dir}/background_template.json"')
    path.write_text(text + "\n")
    return path


def _wait(pred, timeout: float, step: float = 0.002) -> bool:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if pred():
            return True
        time.sleep(step)
    return False


#: ``peaksift`` with each worker of a process pool pausing before it runs anything of its
#: own, after leaving a mark: the window between a fork and the worker's signal set-up, a
#: few milliseconds in real runs, made wide enough for the test to send its signal inside
_SLOW_START = """
import os, sys, time
import multiprocessing.process as mp
run = mp.BaseProcess.run
def slow(self):
    if getattr(self._target, "__module__", "") == "concurrent.futures.process":
        open(os.path.join(os.environ["MARKS"], str(os.getpid())), "w").close()
        time.sleep(1.0)
    return run(self)
mp.BaseProcess.run = slow
from peaksift.cli import main
sys.exit(main(sys.argv[1:]))
"""


def _run_and_stop(config: Path, out: Path, moment: str) -> tuple[int, str]:
    """Start the search in a session of its own, send SIGTERM at ``moment``, and return the
    exit status and stderr once it ended and every process of the session is gone."""
    start = ["-c", _SLOW_START] if moment == "forking" else ["-m", "peaksift"]
    cmd = [sys.executable, *start, "search", str(config), "--out", str(out),
           "--engine", "processes", "--workers", "2", "--toys", "200000", "--quiet"]
    marks = out.parent / "marks"
    marks.mkdir()
    env = {**os.environ, "PYTHONPATH": str(REPO / "src"), "MARKS": str(marks)}
    proc = subprocess.Popen(cmd, env=env, stderr=subprocess.PIPE, text=True,
                            start_new_session=True, cwd=out.parent)
    try:
        children = lambda: [p for p, (pp, _) in _session(proc.pid).items()
                            if p != proc.pid and pp == proc.pid]
        if moment == "before":  # during start-up, before any pool worker exists
            time.sleep(0.3)
            # at most the figure process the command forks first thing on an idle machine
            # (FigureWorker.early); the checks below see that it ends with the run
            assert len(children()) <= 1 and not any(out.glob("*"))
            proc.send_signal(signal.SIGTERM)
        elif moment == "forking":  # the whole group, while a pool worker is in the window
            assert _wait(lambda: any(marks.iterdir()) or proc.poll() is not None, 240, 0.001)
            os.killpg(proc.pid, signal.SIGTERM)
        else:  # "working": the workers have started and run chunks or toys
            assert _wait(lambda: len(children()) >= 1 or proc.poll() is not None, 240)
            time.sleep(1.0)
            proc.send_signal(signal.SIGTERM)
        _, err = proc.communicate(timeout=120)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
            proc.communicate()
    # workers end with their parent (SIGTERM from it, or the parent-death watch): allow it
    # the watch's period and a margin on a loaded machine
    assert _wait(lambda: not _session(proc.pid), 10.0, 0.05), _session(proc.pid)
    return proc.returncode, err


@pytest.mark.slow
@pytest.mark.parametrize("moment", ["before", "forking", "working"])
def test_sigterm_at_any_moment_leaves_no_process_and_no_partial_output(config, tmp_path,
                                                                       moment):
    out = tmp_path / "out"
    rc, err = _run_and_stop(config, out, moment)
    assert "Traceback" not in err, err
    lines = [x for x in err.splitlines() if x.strip()]
    if rc == -signal.SIGTERM:  # default action: only before peaksift set its handler up
        assert moment == "before" and lines == [], err
    else:
        assert rc == 128 + signal.SIGTERM and lines == [LINE], err
    # nothing half-written: the folder this run created is gone, or holds no file at all
    assert not out.exists() or not [p for p in out.rglob("*") if p.is_file()]


def test_a_sigterm_noted_while_held_is_raised_on_the_way_out():
    """A SIGTERM delivered through another thread (POSIX: a process-directed signal goes to
    any thread not blocking it) while this thread forks under ``sigterm_held`` does not
    interrupt the fork's bookkeeping; it is raised, once, right after."""
    got_inside = []
    go, sent = threading.Event(), threading.Event()

    def kill_when_told() -> None:  # started outside: its mask does not block SIGTERM
        go.wait(60)
        os.kill(os.getpid(), signal.SIGTERM)
        sent.set()

    t = threading.Thread(target=kill_when_told)
    t.start()
    with pytest.raises(Terminated), sigterm_as_interrupt():
        with sigterm_held():
            go.set()
            sent.wait(60)
            t.join()
            for _ in range(10000):  # many bytecode boundaries: the handler would run here
                got_inside.append(1)
        pytest.fail("Terminated was not raised after the held section")  # pragma: no cover
    assert len(got_inside) == 10000


def _mask_and_handler() -> tuple[bool, bool]:
    blocked = signal.SIGTERM in signal.pthread_sigmask(signal.SIG_BLOCK, set())
    return blocked, signal.getsignal(signal.SIGTERM) == signal.SIG_DFL


def test_pool_workers_start_with_default_sigterm_and_unblocked():
    """A worker of :func:`process_pool` (forked from a process whose SIGTERM handler raises)
    runs its tasks with SIGTERM at the default action and not blocked: the parent's
    ``terminate`` ends it at once."""
    with sigterm_as_interrupt():
        pool = process_pool(1, "fork")
        try:
            assert pool.submit(_mask_and_handler).result(timeout=60) == (False, True)
        finally:
            pool.shutdown(wait=True)
