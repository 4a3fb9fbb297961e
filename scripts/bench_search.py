"""End-to-end time of the demo search, best of several runs, split by stage.

    python scripts/bench_search.py [--runs 3] [--config demo_data/search.toml]

Each run is a fresh ``python -m peaksift search CONFIG -q`` (imports included, as a user
sees it); the stage split comes from the run's ``provenance.timings`` in results.json
(read and select, scan, global significance, fits, calibration, limits, the figures still
being drawn after the limits, report).  The start-up line is a bare ``import peaksift.cli``
plus the argument parsing.  The machine's load average is printed: on a shared machine the
wall times are only comparable at similar load.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]


def _run(cmd: list[str], env: dict[str, str]) -> float:
    t = time.perf_counter()
    subprocess.run(cmd, check=True, env=env, cwd=REPO, stdout=subprocess.DEVNULL)
    return time.perf_counter() - t


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=3)
    ap.add_argument("--config", default=str(REPO / "demo_data" / "search.toml"))
    args = ap.parse_args()
    env = {**os.environ, "PYTHONPATH": str(REPO / "src")}
    startup = min(_run([sys.executable, "-c", "import peaksift.cli as c; c.build_parser()"],
                       env) for _ in range(args.runs))
    best, stages = float("inf"), {}
    for _ in range(args.runs):
        with tempfile.TemporaryDirectory() as tmp:
            out = Path(tmp) / "out"
            wall = _run([sys.executable, "-m", "peaksift", "search", args.config, "-q",
                         "--out", str(out)], env)
            timings = json.loads((out / "results.json").read_text())["provenance"]["timings"]
        if wall < best:
            best, stages = wall, timings
    print(f"load average {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores")
    print(f"demo search end to end (best of {args.runs}): {best:.2f} s")
    print(f"  {'start-up (imports, parser)':<28} {startup:6.2f} s")
    for k, v in stages.items():
        print(f"  {k:<28} {v:6.2f} s")
    rest = best - startup - sum(stages.values())
    print(f"  {'other (config, hashes, exit)':<28} {rest:6.2f} s")


if __name__ == "__main__":
    main()
