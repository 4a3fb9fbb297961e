"""Stages run beside each other (``search.parallel``): the same outputs as one process, and
nothing lost when a child fails.

The reference is the same search run in one process (``PEAKSIFT_INLINE=1``): the forked
stages must give identical numbers and the same files, as the execution engines must give
the serial engine's bits (DEVELOPERS.md, "Add an execution engine").
"""

from __future__ import annotations

import json
import os
from pathlib import Path

import pytest

import peaksift
from peaksift.errors import ConfigError
from peaksift.search import parallel

REPO = Path(__file__).resolve().parents[1]

pytestmark = pytest.mark.skipif(not parallel.forking(),
                                reason="stages run beside each other only where fork is safe")


def _config(small_demo, systematics: bool = False):
    """The demo search on the small demo set, quick (few toys and limit points, PNG only);
    ``systematics``: with the demo's [systematics] (the envelope curve on the scan figure).
    The small set has few events under each signal, so the limits' ``auto`` method computes
    every limit point with toys (20 each: the numbers are compared, not their precision)."""
    from peaksift.config import load_config

    off = {} if systematics else {"systematics__mass_scale": 0.0,
                                  "systematics__mass_resolution": 0.0,
                                  "systematics__background_families": []}
    return load_config(REPO / "demo_data" / "search.toml").with_overrides(
        input__files=[str(p) for p in sorted(small_demo.glob("*.parquet"))],
        significance__toys=20, limits__points=5, limits__toys=20, output__formats=["png"],
        **off)


def _figures_config(small_demo):
    """For the tests of the figure processes (what is drawn, and by whom): the asymptotic
    limits (a quarter of the run's CPU; the toy limits beside are compared above)."""
    return _config(small_demo).with_overrides(limits__method="asymptotic")


def _numbers(out: Path) -> dict:
    d = json.loads((out / "results.json").read_text())
    return {k: d[k] for k in ("fit", "background_fit", "scan", "best", "limits",
                              "calibration")}


@pytest.mark.slow  # two whole searches with systematics
def test_forked_stages_give_the_one_process_result(small_demo, tmp_path, monkeypatch):
    cfg = _config(small_demo, systematics=True)
    peaksift.run_search(cfg, out=tmp_path / "beside", progress=False)
    monkeypatch.setenv("PEAKSIFT_INLINE", "1")
    peaksift.run_search(cfg, out=tmp_path / "inline", progress=False)
    assert _numbers(tmp_path / "beside") == _numbers(tmp_path / "inline")
    names = {p.name for p in (tmp_path / "beside" / "figures").iterdir()}
    assert names == {p.name for p in (tmp_path / "inline" / "figures").iterdir()}
    assert {"spectrum.png", "pvalue_scan.png", "limits.png", "calibration.png",
            "background_envelope.png"} <= names
    assert not any(n.startswith(".") for n in names)  # no listing or temporary left


def test_a_figure_the_child_fails_to_draw_is_drawn_by_the_parent(small_demo, tmp_path,
                                                                 monkeypatch):
    from peaksift import plotting

    parent = os.getpid()
    real = plotting.search_figures

    def fails_in_child(result, outdir, **kw):
        if os.getpid() != parent and "limits" in kw.get("names", ()):
            raise RuntimeError("drawing failed in the child")
        return real(result, outdir, **kw)

    monkeypatch.setattr(plotting, "search_figures", fails_in_child)
    res = peaksift.run_search(_figures_config(small_demo), out=tmp_path / "out",
                              progress=False)
    assert (tmp_path / "out" / "figures" / "limits.png").stat().st_size > 0
    assert "limits" in res.figures


def _refuse(x: int) -> int:
    raise ConfigError(f"limits.points = {x}: refused as asked by the test")


def test_an_error_beside_is_raised_here_with_its_message():
    job = parallel.Beside(_refuse, 7)
    with pytest.raises(ConfigError, match="limits.points = 7"):
        job.result()


def test_a_value_computed_beside_comes_back():
    job = parallel.Beside(sorted, [3, 1, 2])
    assert job.result() == [1, 2, 3]


def test_drawers_do_not_reuse_the_parents_typeset_text(small_demo, tmp_path, monkeypatch):
    # matplotlib's FreeType fonts are not fork-safe (matplotlib.font_manager's own note; it
    # empties only its font cache in a forked child): text typeset before the fork (here
    # measured as a path, as the value tables do) keeps glyphs of fonts whose file offset
    # every forked drawer would share.  A drawer typesetting the same text must parse it
    # anew (a cache miss), however much the parent drew before the search.
    from matplotlib.mathtext import MathTextParser

    from peaksift import plotting
    from peaksift._annotations import text_width

    text = r"$N_{sig}^{parent}$ typeset before the search"
    text_width(text, 8.8)
    parent = os.getpid()
    log = tmp_path / "inherited.txt"
    real = plotting.search_figures

    def logged(result, outdir, **kw):
        if os.getpid() != parent:
            hits = MathTextParser._parse_cached.cache_info().hits
            text_width(text, 8.8)
            with open(log, "a") as f:
                f.write(f"{MathTextParser._parse_cached.cache_info().hits - hits}\n")
        return real(result, outdir, **kw)

    monkeypatch.setattr(plotting, "search_figures", logged)
    text_width(text, 8.8)  # in this process the text is cached: a hit
    peaksift.run_search(_figures_config(small_demo), out=tmp_path / "out", progress=False)
    reused = [int(x) for x in log.read_text().split()]
    # each drawer's first job misses (parses anew); later jobs of a drawer hit its own entry
    assert reused and reused.count(0) >= 1 and len(reused) == 5, reused


def test_two_drawers_share_the_figures_each_drawn_once(small_demo, tmp_path, monkeypatch):
    # Every figure is drawn exactly once, none by the main process, and (each drawing made
    # slow, so that both drawers are busy) by two processes: the second drawer takes jobs
    # from the same queue.  Reference: the figures plotting.search_figures lists for a run
    # without systematics (every one but the envelope's), one PNG each.
    import time

    from peaksift import plotting

    parent = os.getpid()
    log = tmp_path / "drawn.txt"
    real = plotting.search_figures

    def slow_and_logged(result, outdir, **kw):
        if os.getpid() != parent:
            time.sleep(0.5)
        with open(log, "a") as f:
            f.write(f"{os.getpid()} {','.join(kw.get('names', ()))}\n")
        return real(result, outdir, **kw)

    monkeypatch.setattr(plotting, "search_figures", slow_and_logged)
    peaksift.run_search(_figures_config(small_demo), out=tmp_path / "beside", progress=False)
    lines = [ln.split() for ln in log.read_text().splitlines()]
    names = [n for _, n in lines]
    expected = set(plotting.SEARCH_FIGURES) - {"background_envelope"}
    assert sorted(names) == sorted(expected), lines  # each drawn once
    pids = {int(p) for p, _ in lines}
    assert parent not in pids and len(pids) == 2, lines
    files = {p.name for p in (tmp_path / "beside" / "figures").iterdir()}
    assert files == {f"{n}.png" for n in expected}


_DRAWER_DIES = """
import os, sys
from pathlib import Path
import peaksift
from peaksift.config import load_config
from peaksift.search import parallel

parent = os.getpid()
real = parallel._warm_up

def dies_in_child(*args):
    if os.getpid() != parent:
        os._exit(3)  # the drawer dies before it reads a single job
    real(*args)

parallel._warm_up = dies_in_child
cfg = load_config(Path(sys.argv[1]) / "demo_data" / "search.toml").with_overrides(
    input__files=sys.argv[3:], significance__toys=20, limits__points=5,
    limits__method="asymptotic", output__formats=["png"], systematics__mass_scale=0.0,
    systematics__mass_resolution=0.0, systematics__background_families=[])
res = peaksift.run_search(cfg, out=sys.argv[2], progress=False)
print(sorted(res.figures))
"""


def test_a_drawer_that_dies_at_once_leaves_the_figures_to_the_parent(small_demo, tmp_path):
    # The figure process dies before reading any job: the parent draws every figure and the
    # run ends (the jobs left in the queue's pipe must not hold the process at its exit:
    # without the fix this run hung after printing).  Reference: the figures
    # plotting.search_figures lists for a run without systematics, one PNG each.
    import subprocess
    import sys

    from peaksift import plotting

    script = tmp_path / "dies.py"
    script.write_text(_DRAWER_DIES)
    files = [str(p) for p in sorted(small_demo.glob("*.parquet"))]
    done = subprocess.run([sys.executable, str(script), str(REPO), str(tmp_path / "out"),
                           *files], capture_output=True, text=True, timeout=600, check=False)
    assert done.returncode == 0, done.stderr[-2000:]
    names = {p.name for p in (tmp_path / "out" / "figures").iterdir()}
    expected = set(plotting.SEARCH_FIGURES) - {"background_envelope"}
    assert names == {f"{n}.png" for n in expected}
