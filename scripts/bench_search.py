"""End-to-end time of the demo search, best of several runs, split by stage.

    python scripts/bench_search.py [--runs 3] [--config demo_data/search.toml]
                                   [--variant both|with|without] [--baseline SRC] [--inline]

Each run is a fresh ``python -m peaksift search CONFIG -v`` (imports included, as a user
sees it; ``-v`` for its stage lines, which give the main process's CPU time by stage). By
default both variants run, in alternate rounds: the config as it is and without its
``[systematics]`` table (a copy in a temporary folder, input paths made absolute: the demo
as it was when issue 17 set its 2.5 s target). Printed per variant and tree: best and
median wall time, the CPU time of the run and of every process it started (figures and
limits run in processes of their own, beside the statistics), and the stage split of the
best run from its ``provenance.timings``, grouped as imports, read/pair, scan, toys (global
significance), systematics, fit (the fits and the calibration), limits (the wait for the
limits beside), figures (the wait for the last figure), report; then the main process's CPU
seconds by stage (least and median over the runs; "start-up" is everything before the first
stage: imports, config, input checks, the figure process's fork), where the tree's log
gives them. "imports" is ``from peaksift.search import run_search`` alone, timed in its own
process (what the command imports before the config is read; ``peaksift.search`` alone
loads its submodules on first use); "other" is the rest of the wall time outside the stages
(config, input checks, process exit).

``--as-if-idle`` runs the command with the load average reported as 0, so the figure process
is forked first thing as on an idle machine (``FigureWorker.early`` skips that early fork
on a busy one): on a shared machine, the per-process CPU of the idle machine's layout.
``--baseline SRC`` also runs another source tree (e.g. a ``git archive`` of main unpacked
into /tmp) in alternate rounds, so the two are compared at the same load; ``--inline``
also runs this tree with ``PEAKSIFT_INLINE=1`` (every stage in one process, in order:
what the stages beside each other save).  The machine's load average is printed before
and after: on a shared machine wall times are only comparable at similar load; CPU times
are steadier.
"""

from __future__ import annotations

import argparse
import json
import os
import re
import resource
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]


def _run(cmd: list[str], env: dict[str, str]) -> tuple[float, float, dict[str, float]]:
    """Wall and CPU seconds (user + system, children included) of one command, and the main
    process's CPU seconds by stage from its ``-v`` log lines (``start-up``: before the first
    stage; empty for a tree whose log does not give them)."""
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    t = time.perf_counter()
    done = subprocess.run(cmd, check=True, env=env, cwd=REPO, stdout=subprocess.DEVNULL,
                          stderr=subprocess.PIPE, text=True)
    wall = time.perf_counter() - t
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    stages = {m.group(1).strip(): float(m.group(2)) for m in re.finditer(
        r"(?m)^peaksift: (.+?)\s+(?:[0-9.]+ s )?\s*\(CPU\s+([0-9.]+) s\)$", done.stderr)}
    return wall, (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime), stages


def _without_systematics(config: Path, tmp: Path) -> Path:
    """A copy of ``config`` without its ``[systematics]`` table, input globs made absolute."""
    text = config.read_text()
    text = re.sub(r"(?ms)^\[systematics\].*?(?=^\[)", "", text)
    text = re.sub(r'(?m)^files = \["([^"/][^"]*)"\]',
                  lambda m: f'files = ["{(config.parent / m.group(1)).as_posix()}"]', text)
    out = tmp / "search_no_systematics.toml"
    out.write_text(text)
    return out


#: provenance.timings stages -> the groups printed (in this order)
GROUPS = {"read/pair": ("read and select",), "scan": ("mass scan",),
          "toys": ("global significance",), "systematics": ("systematics",),
          "fit": ("fits", "calibration"),
          "limits": ("limits", "limits (rest of)", "limits with systematics",
                     "limits with systematics (rest of)"),
          "figures": ("figures (here)", "figures (waiting)"), "report": ("report",)}


def _print(name: str, rs: list[tuple[float, float, dict[str, float], dict[str, float]]],
           imports: list[float], stage_cpu: list[dict[str, float]]) -> None:
    walls = [w for w, _, _, _ in rs]
    best = min(rs, key=lambda x: x[0])
    cpus_all = [c for _, c, _, _ in rs]
    print(f"{name}: end to end best {best[0]:.2f} s, median {statistics.median(walls):.2f} s "
          f"(of {len(rs)}); CPU of the best run {best[1]:.2f} s (all processes); CPU of "
          f"all runs best {min(cpus_all):.2f} s, median {statistics.median(cpus_all):.2f} s")
    if len(rs) > 1 and all(r[3] for r in rs):  # each process's least and median CPU
        procs = list(dict.fromkeys(k for r in rs for k in r[3]))
        print("  CPU by process over the runs (least / median): " + ", ".join(
            f"{k} {min(r[3].get(k, 0.0) for r in rs):.2f} / "
            f"{statistics.median(r[3].get(k, 0.0) for r in rs):.2f} s" for k in procs))
    t = best[2]
    row = {"imports": min(imports)}
    row.update({g: sum(t.get(k, 0.0) for k in keys) for g, keys in GROUPS.items()})
    unknown = [k for k in t if not any(k in keys for keys in GROUPS.values())]
    row.update({k: t[k] for k in unknown})
    row["other"] = best[0] - sum(row.values())
    print("  " + "  ".join(f"{k} {v:.2f}" for k, v in row.items()) + "  (s)")
    if any(stage_cpu):  # the main line's CPU by stage: least and median over the runs
        keys = list(dict.fromkeys(k for s in stage_cpu for k in s))
        print("  main process CPU by stage (least / median): " + ", ".join(
            f"{k} {min(s.get(k, 0.0) for s in stage_cpu):.2f} / "
            f"{statistics.median(s.get(k, 0.0) for s in stage_cpu):.2f}" for k in keys)
            + " s")
    if best[3]:  # CPU per process: what the wall time would be on idle cores
        cpus = best[3]
        total = sum(cpus.values())
        n = os.cpu_count() or 1
        bound = max(cpus.get("main", 0.0), total / n)
        # until the figure process forks only the main line runs (its start-up S); then
        # every process shares the cores: about S + (total - S) / n on idle cores
        start = stage_cpu[rs.index(best)].get("start-up") if stage_cpu else None
        model = (f", about {start + (total - start) / n:.2f} s (start-up {start:.2f} s alone, "
                 "the rest shared)" if start is not None else "")
        print("  CPU by process: " + ", ".join(f"{k} {v:.2f} s" for k, v in cpus.items())
              + f"; on {n} idle cores no sooner than {bound:.2f} s{model}")


#: ``python -m peaksift`` with the load average reported as 0 (``--as-if-idle``)
_IDLE = ("import os; os.getloadavg = lambda: (0.0, 0.0, 0.0); "
         "from peaksift.cli import run; run()")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=3)
    ap.add_argument("--config", default=str(REPO / "demo_data" / "search.toml"))
    ap.add_argument("--variant", choices=("both", "with", "without"), default="both",
                    help="with or without the config's [systematics] table, or both")
    ap.add_argument("--no-systematics", action="store_true",
                    help="the same as --variant without")
    ap.add_argument("--baseline", default=None, metavar="SRC",
                    help="another source tree to run in alternate rounds")
    ap.add_argument("--inline", action="store_true",
                    help="also run this tree with every stage in one process")
    ap.add_argument("--as-if-idle", action="store_true",
                    help="report a zero load average to the command: the early figure fork "
                         "is made as on an idle machine")
    args = ap.parse_args()
    variant = "without" if args.no_systematics else args.variant
    here = str(REPO / "src")
    trees: dict[str, tuple[str, dict[str, str]]] = {"this tree": (here, {})}
    if args.inline:
        trees["this tree, one process"] = (here, {"PEAKSIFT_INLINE": "1"})
    if args.baseline:
        trees["baseline"] = (str(Path(args.baseline).resolve()), {})
    load0 = os.getloadavg()[0]
    with tempfile.TemporaryDirectory() as tmpd:
        tmp = Path(tmpd)
        config = Path(args.config).resolve()
        configs = {}
        if variant in ("both", "with"):
            configs["with [systematics]"] = config
        if variant in ("both", "without"):
            configs["without [systematics]"] = _without_systematics(config, tmp)
        keys = [(v, t) for v in configs for t in trees]
        runs: dict[tuple[str, str], list[tuple[float, float, dict[str, float],
                                               dict[str, float]]]] = {k: [] for k in keys}
        imports: dict[str, list[float]] = {t: [] for t in trees}
        stage_cpu: dict[tuple[str, str], list[dict[str, float]]] = {k: [] for k in keys}
        for r in range(args.runs):
            for v, name in keys:
                src, extra = trees[name]
                env = {**os.environ, "PYTHONPATH": src, **extra}
                imports[name].append(_run([sys.executable, "-c",
                                           "from peaksift.search import run_search"], env)[0])
                out = tmp / f"out{r}_{len(runs[v, name])}_{abs(hash((v, name)))}"
                command = ([sys.executable, "-c", _IDLE] if args.as_if_idle
                           else [sys.executable, "-m", "peaksift"])
                wall, cpu, stages = _run([*command, "search", str(configs[v]), "-v",
                                          "--out", str(out)], env)
                stage_cpu[v, name].append(stages)
                prov = json.loads((out / "results.json").read_text())["provenance"]
                runs[v, name].append((wall, cpu, prov["timings"], prov.get("cpu") or {}))
    print(f"load average {load0:.1f} before, {os.getloadavg()[0]:.1f} after, on "
          f"{os.cpu_count()} cores; {args.runs} rounds"
          + ("; the early figure fork forced (--as-if-idle)" if args.as_if_idle else ""))
    for (v, name), rs in runs.items():
        _print(f"{v}, {name}", rs, imports[name], stage_cpu[v, name])


if __name__ == "__main__":
    main()
