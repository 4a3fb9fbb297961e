"""SIGTERM and Ctrl-C and the Dask engine's local cluster: ``peaksift spectrum --engine
dask`` stopped while the cluster starts or while its workers run chunks ends with exit
status 143 (SIGTERM) or 130 (Ctrl-C), one line on stderr (no traceback, none of the
cluster's shutdown chatter), no process of the run left and nothing half-written in the
output folder.

The moments are made certain, not hoped for: a worker process waits 1 s between its fork
and its start (the window before its own signal set-up), a spawned worker's interpreter
waits 1 s in its start-up (a ``sitecustomize`` on its path), or each chunk a worker takes
waits (the case where closing the cluster politely would wait for the task: Dask's nanny
gives a worker 0.8 x 5 s to finish, then kills it with a warning).

Outside references: the shell convention of 128 + signal number for a process ended by a
signal (POSIX ``wait(2)`` status, ``sh(1)``); processes are found through
``/proc/<pid>/stat`` (Linux ``proc(5)``: field 6 is the session id).
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

pytest.importorskip("distributed", reason="the Dask engine needs the 'distributed' extra")

REPO = Path(__file__).resolve().parents[1]
LINE = {signal.SIGTERM: "peaksift: terminated (SIGTERM); the run's unfinished outputs were removed",
        signal.SIGINT: "peaksift: interrupted; no outputs were written"}

pytestmark = pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc")

#: ``peaksift`` with the chunk work, in a process other than this one, leaving a mark and
#: then waiting (the local cluster's workers are forked from here, so they inherit it); with
#: ``starting``, each worker process instead leaves its mark and waits 1 s before it runs
#: anything of Dask's: the window between a fork and the worker's own signal set-up
_WAITING = """
import os, signal, sys, time
# started as a shell starts a foreground job, whatever this test process holds: SIGINT and
# SIGTERM unblocked (a mask survives fork and exec) and handled by Python's defaults
signal.pthread_sigmask(signal.SIG_UNBLOCK, {signal.SIGINT, signal.SIGTERM})
signal.signal(signal.SIGINT, signal.default_int_handler)
signal.signal(signal.SIGTERM, signal.SIG_DFL)
import multiprocessing.process as mp
import peaksift.execution._chunk as chunk
mark = lambda: open(os.path.join(os.environ["MARKS"], str(os.getpid())), "w").close()
work, parent = chunk.process_chunk, os.getpid()
def waiting(spec, selection):
    if os.getpid() != parent:
        mark()
        time.sleep(120.0)
    return work(spec, selection)
run = mp.BaseProcess.run
def slow_start(self):
    if getattr(self._target, "__qualname__", "") == "AsyncProcess._run":
        mark()
        time.sleep(1.0)
    return run(self)
if sys.argv[1] == "starting":
    mp.BaseProcess.run = slow_start
elif sys.argv[1] == "working":
    chunk.process_chunk = waiting
from peaksift.cli import main
sys.exit(main(sys.argv[2:]))
"""


def _session(sid: int) -> dict[int, int]:
    """pid -> parent pid of every live process in session ``sid`` (proc(5))."""
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
            out[int(d)] = int(f[1])
    return out


def _wait(pred, timeout: float, step: float = 0.02) -> bool:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if pred():
            return True
        time.sleep(step)
    return False


#: ``spawning``: a spawned worker's interpreter leaves its mark and waits 1 s while it starts
#: (in ``site``, before any of Dask's or peaksift's code runs in it)
_SPAWNING = """
import os, sys, time
if os.environ.get("MARKS") and "--multiprocessing-fork" in sys.argv:
    open(os.path.join(os.environ["MARKS"], str(os.getpid())), "w").close()
    time.sleep(1.0)
"""


@pytest.mark.slow
@pytest.mark.parametrize(("moment", "sig"), [("starting", signal.SIGTERM),
                                             ("starting", signal.SIGINT),
                                             ("spawning", signal.SIGINT),
                                             ("working", signal.SIGTERM)])
def test_sigterm_leaves_no_dask_worker_and_no_partial_output(small_demo, tmp_path, moment,
                                                             sig):
    """``starting``: SIGTERM (as batch systems send it) or SIGINT (Ctrl-C at a terminal) to
    the whole process group while a worker of the cluster is between its fork and its
    signal set-up; ``spawning``: Ctrl-C while a spawned worker's interpreter starts (no
    traceback from it: it starts with SIGINT blocked); ``working``: SIGTERM to peaksift
    alone while both workers are inside a chunk."""
    config = tmp_path / "spectrum.toml"
    config.write_text(f"""
[input]
files = ["{small_demo}/*.parquet"]
[objects]
collection = "muon"
cut = "pt > 20"
[pairing]
charge = "opposite"
[spectrum]
window = [110.0, 200.0]
bin_width = 1.0
[model.resolution]
relative = 0.01
[execution]
engine = "dask"
workers = 2
start_method = "{'spawn' if moment == 'spawning' else 'fork'}"
chunk_events = 3000
""")
    out, marks, site = tmp_path / "out", tmp_path / "marks", tmp_path / "site"
    marks.mkdir()
    site.mkdir()
    (site / "sitecustomize.py").write_text(_SPAWNING)
    path = str(REPO / "src") + (os.pathsep + str(site) if moment == "spawning" else "")
    env = {**os.environ, "PYTHONPATH": path, "MARKS": str(marks)}
    proc = subprocess.Popen([sys.executable, "-c", _WAITING, moment, "spectrum", str(config),
                             "--out", str(out), "--quiet"], env=env, stderr=subprocess.PIPE,
                            text=True, start_new_session=True, cwd=tmp_path)
    try:
        # a worker in its start-up window, or both inside a chunk
        want = 2 if moment == "working" else 1
        assert _wait(lambda: len(list(marks.iterdir())) >= want or proc.poll() is not None,
                     120, 0.002)
        workers = {int(p.name) for p in marks.iterdir()}
        assert proc.poll() is None and workers <= set(_session(proc.pid))
        t0 = time.monotonic()
        if moment != "working":
            os.killpg(proc.pid, sig)
        else:
            proc.send_signal(sig)
        _, err = proc.communicate(timeout=60)
        stopped = time.monotonic() - t0
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
            proc.communicate()
    assert _wait(lambda: not _session(proc.pid), 10.0), _session(proc.pid)
    assert proc.returncode == 128 + sig, err  # the shell's convention (sh(1))
    assert [x for x in err.splitlines() if x.strip()] == [LINE[sig]], err
    if moment == "working":  # without waiting for the chunks in flight (a polite close
        assert stopped < 3.9, f"{stopped:.1f} s from SIGTERM to exit"  # takes 0.8 x 5 s)
    assert not out.exists() or not [p for p in out.rglob("*") if p.is_file()]
