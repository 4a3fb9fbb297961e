"""End-to-end time of the demo search, best of several runs, split by stage.

    python scripts/bench_search.py [--runs 3] [--config demo_data/search.toml]
                                   [--no-systematics] [--baseline SRC]

Each run is a fresh ``python -m peaksift search CONFIG -q`` (imports included, as a user
sees it).  Printed per variant: best and median wall time, the CPU time of the run and of
every process it started (figures and limits run in processes of their own, beside the
statistics), and the stage split of the best run from its ``provenance.timings``.  The
start-up line is ``import peaksift.search`` alone (what the command imports before the
config is read); "other" is the rest of the wall time outside the stages (config, input
checks, process exit).

``--no-systematics`` runs the config without its ``[systematics]`` table (a copy in a
temporary folder, input paths made absolute).  ``--baseline SRC`` also runs another source
tree (e.g. a ``git archive`` of main unpacked into /tmp) in alternate rounds, so the two
are compared at the same load; ``--inline`` also runs this tree with ``PEAKSIFT_INLINE=1``
(every stage in one process, in order: what the stages beside each other save).  The machine's load average is printed: on a shared
machine wall times are only comparable at similar load; CPU times are steadier.
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


def _run(cmd: list[str], env: dict[str, str]) -> tuple[float, float]:
    """Wall and CPU seconds (user + system, children included) of one command."""
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    t = time.perf_counter()
    subprocess.run(cmd, check=True, env=env, cwd=REPO, stdout=subprocess.DEVNULL)
    wall = time.perf_counter() - t
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    return wall, (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)


def _without_systematics(config: Path, tmp: Path) -> Path:
    """A copy of ``config`` without its ``[systematics]`` table, input globs made absolute."""
    text = config.read_text()
    text = re.sub(r"(?ms)^\[systematics\].*?(?=^\[)", "", text)
    text = re.sub(r'(?m)^files = \["([^"/][^"]*)"\]',
                  lambda m: f'files = ["{(config.parent / m.group(1)).as_posix()}"]', text)
    out = tmp / "search_no_systematics.toml"
    out.write_text(text)
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=3)
    ap.add_argument("--config", default=str(REPO / "demo_data" / "search.toml"))
    ap.add_argument("--no-systematics", action="store_true")
    ap.add_argument("--baseline", default=None, metavar="SRC",
                    help="another source tree to run in alternate rounds")
    ap.add_argument("--inline", action="store_true",
                    help="also run this tree with every stage in one process")
    args = ap.parse_args()
    here = str(REPO / "src")
    trees: dict[str, tuple[str, dict[str, str]]] = {"this tree": (here, {})}
    if args.inline:
        trees["this tree, one process"] = (here, {"PEAKSIFT_INLINE": "1"})
    if args.baseline:
        trees["baseline"] = (str(Path(args.baseline).resolve()), {})
    with tempfile.TemporaryDirectory() as tmpd:
        tmp = Path(tmpd)
        config = Path(args.config).resolve()
        if args.no_systematics:
            config = _without_systematics(config, tmp)
        runs: dict[str, list[tuple[float, float, dict[str, float], dict[str, float]]]] = {
            k: [] for k in trees}
        startup: dict[str, list[float]] = {k: [] for k in trees}
        for r in range(args.runs):
            for name, (src, extra) in trees.items():
                env = {**os.environ, "PYTHONPATH": src, **extra}
                startup[name].append(_run([sys.executable, "-c", "import peaksift.search"],
                                          env)[0])
                out = tmp / f"out{r}_{len(runs[name])}_{name.replace(' ', '_').replace(',', '')}"
                wall, cpu = _run([sys.executable, "-m", "peaksift", "search", str(config),
                                  "-q", "--out", str(out)], env)
                prov = json.loads((out / "results.json").read_text())["provenance"]
                runs[name].append((wall, cpu, prov["timings"], prov.get("cpu") or {}))
    print(f"load average {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores; "
          f"{'without' if args.no_systematics else 'with'} [systematics]")
    for name, rs in runs.items():
        walls = [w for w, _, _, _ in rs]
        best = min(rs, key=lambda x: x[0])
        print(f"{name}: end to end best {best[0]:.2f} s, median {statistics.median(walls):.2f} s "
              f"(of {len(rs)}); CPU of the best run {best[1]:.2f} s (all processes)")
        print(f"  {'start-up (import peaksift.search)':<36} {min(startup[name]):6.2f} s")
        for k, v in best[2].items():
            print(f"  {k:<36} {v:6.2f} s")
        rest = best[0] - min(startup[name]) - sum(best[2].values())
        print(f"  {'other (config, input checks, exit)':<36} {rest:6.2f} s")
        if best[3]:  # CPU per process: what the wall time would be on idle cores
            cpus = best[3]
            total = sum(cpus.values())
            bound = max(cpus.get("main", 0.0), total / (os.cpu_count() or 1))
            print("  CPU by process: " + ", ".join(f"{k} {v:.2f} s" for k, v in cpus.items())
                  + f"; on {os.cpu_count()} idle cores no sooner than {bound:.2f} s")


if __name__ == "__main__":
    main()
