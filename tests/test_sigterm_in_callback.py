"""SIGTERM that arrives while C code calls back into Python (llvmlite's object-cache hook,
which numba's first compilation of a kernel goes through).

Outside reference: the ctypes documentation ("Callback functions": an exception raised in a
callback is printed to stderr and ignored, it does not propagate).  A SIGTERM handler that
raises there loses the termination, and the run goes on to its end; seen on a fresh install
(no numba cache), where the search was stopped while compiling.
"""

from __future__ import annotations

import os
import signal
import time

import pytest

from peaksift._processes import Terminated, sigterm_as_interrupt

llvm = pytest.importorskip("llvmlite.binding")


def _engine():
    llvm.initialize_native_target()
    llvm.initialize_native_asmprinter()
    mod = llvm.parse_assembly("define i32 @one() {\n  ret i32 1\n}")
    mod.verify()
    tm = llvm.Target.from_default_triple().create_target_machine()
    return llvm.create_mcjit_compiler(mod, tm)


def test_sigterm_inside_a_native_callback_is_delivered_after_it(capfd):
    """The callback finishes (its last statement runs), then Terminated is raised in the
    Python code that follows, within 2 s; nothing is printed about an ignored exception."""
    ee = _engine()
    finished = []

    def notify(module, buf):  # called from C while the engine emits the object code
        os.kill(os.getpid(), signal.SIGTERM)
        sum(range(10_000))  # bytecode after the signal: where a raising handler would run
        finished.append(True)

    ee.set_object_cache(notify)
    reached_end = False
    with pytest.raises(Terminated), sigterm_as_interrupt():
        ee.finalize_object()
        t0 = time.monotonic()
        while time.monotonic() - t0 < 2.0:
            pass
        reached_end = True
    assert finished == [True] and not reached_end
    assert "Exception ignored" not in capfd.readouterr().err
