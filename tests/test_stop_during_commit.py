"""A Ctrl-C or SIGTERM while a run's outputs are moved into place.

The output-folder contract (``peaksift._output``): an interrupted run leaves the output
folder as it was, a finished one leaves its own files; never a mix.  The moves are one
``rename(2)`` per file (POSIX: each atomic, the set not), so a signal that lands between
two of them is held until the last is done, then raised as usual.
"""

from __future__ import annotations

import os
import signal
from pathlib import Path

import pytest

from peaksift import _output, cli
from peaksift._processes import Terminated, sigterm_as_interrupt

NAMES = ["a.json", "b.json", "c.json"]
SIGNALS = {"SIGTERM": (signal.SIGTERM, Terminated), "SIGINT": (signal.SIGINT, KeyboardInterrupt)}


pytestmark = pytest.mark.usefixtures("python_ctrl_c")


def _run(target: Path, text: str) -> None:
    with _output.staged_output(target, "search") as folder:
        for n in NAMES:
            (folder.path / n).write_text(text)


@pytest.mark.parametrize("name", SIGNALS)
def test_a_stop_between_two_moves_comes_after_the_last(tmp_path, monkeypatch, name):
    signum, kind = SIGNALS[name]
    target = tmp_path / "out"
    _run(target, "previous run")
    replace = os.replace
    stopped: list[str] = []

    def replace_then_stop(src, dst):
        replace(src, dst)
        if Path(dst).name == NAMES[0] and not stopped:  # the first of this run's files moved
            stopped.append(str(dst))
            os.kill(os.getpid(), signum)
            sum(range(10_000))  # bytecode where a handler would raise

    monkeypatch.setattr(_output.os, "replace", replace_then_stop)
    with pytest.raises(kind) as raised, sigterm_as_interrupt():
        _run(target, "this run")
    assert raised.type is kind and stopped
    assert {n: (target / n).read_text() for n in NAMES} == dict.fromkeys(NAMES, "this run")
    assert not list(target.glob(".peaksift-staging-*"))
    # the command's one line then says the outputs are in place, not that they were removed
    line = cli._stopped(raised.value, "stopped", "no outputs were written")
    assert str(target) in line and "no outputs" not in line


def test_a_stop_before_the_moves_says_nothing_was_written(tmp_path):
    target = tmp_path / "out"
    with pytest.raises(KeyboardInterrupt) as raised, _output.staged_output(target, "search") as f:
        (f.path / NAMES[0]).write_text("this run")
        raise KeyboardInterrupt
    assert not (target / NAMES[0]).exists()
    assert cli._stopped(raised.value, "stopped", "no outputs were written").endswith(
        "no outputs were written")
