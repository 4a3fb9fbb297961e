"""Benchmark the event reader against a raw pyarrow read of the same columns, in the same run.

    python scripts/bench_read.py                 # demo-sized set + a 5M-event generated set
    python scripts/bench_read.py --events 1000000 --repeat 2
    python scripts/bench_read.py --events 2000000 --collection muon   # one collection

For each data set it times (best of --repeat):

* raw pyarrow: ``pyarrow.parquet.ParquetFile(f).read(columns=...)`` for every file, with the
  same leaf columns peaksift reads (the baseline);
* ``peaksift.read_events`` (everything: awkward arrays with Momentum4D records, input checks);
* ``peaksift.iter_events`` over chunks (the streaming path the search uses).

With ``--collection NAME`` the comparison is for one collection: the raw side reads that
collection's leaf columns and turns them into numpy arrays (offsets and one flat array per
field, ``combine_chunks`` + ``to_numpy``: what any reader of the data must do), peaksift
reads ``read_events(source, NAME)``.

It prints events/s and the ratio speed(peaksift) / speed(raw pyarrow), from wall-clock time
and from user CPU time (all threads; steadier on a shared machine); the target is >= 0.9.
The large set is generated to a temporary directory and removed afterwards.
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq

REPO_DIR = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO_DIR / "src"))

from peaksift import events, simulate


def _leaf_columns(path: Path) -> list[str]:
    pf = pq.ParquetFile(path)
    return [pf.schema.column(i).path for i in range(len(pf.schema))]


def _timed(fn) -> tuple[float, float]:
    """Wall time and user CPU time (all threads of this process) of one call.

    User time leaves out the kernel's page-fault and scheduling time, which on a shared
    machine swings by a factor of two from run to run."""
    t0 = os.times()
    fn()
    t1 = os.times()
    return t1.elapsed - t0.elapsed, t1.user - t0.user


def bench(source: Path, repeat: int, chunk_events: int, collection: str | None = None
          ) -> dict[str, float]:
    files = events.list_files(source)
    n = sum(pq.ParquetFile(f).metadata.num_rows for f in files)
    cols = {f: [c for c in _leaf_columns(f) if collection is None
                or c.startswith(collection + ".")] for f in files}

    def raw() -> None:
        for f in files:
            t = pq.ParquetFile(f).read(columns=cols[f], use_threads=True)
            if collection is not None:  # and numpy arrays, as any reader needs them
                ch = t.column(collection).combine_chunks()
                _ = np.asarray(ch.offsets)
                vals = ch.values
                for i in range(vals.type.num_fields):
                    _ = vals.field(i).to_numpy(zero_copy_only=False)

    def ours() -> None:
        events.read_events(source, collection)

    def streamed() -> None:
        for _ in events.iter_events(source, chunk_events=chunk_events,
                                    collections=collection):
            pass

    raw()  # warm the page cache once so neither side pays for the first disk read
    # interleave the three so load from other processes hits all of them alike
    wall = dict.fromkeys(("raw", "read_events", "iter_events"), float("inf"))
    cpu = dict(wall)
    for _ in range(repeat):
        for key, fn in (("raw", raw), ("read_events", ours), ("iter_events", streamed)):
            w, c = _timed(fn)
            wall[key], cpu[key] = min(wall[key], w), min(cpu[key], c)
    return {"events": n, **wall, **{"cpu_" + k: v for k, v in cpu.items()}}


def _report(name: str, r: dict[str, float]) -> None:
    n = r["events"]
    print(f"{name}: {n:,} events")
    for key in ("raw", "read_events", "iter_events"):
        label = {"raw": "raw pyarrow read", "read_events": "peaksift.read_events",
                 "iter_events": "peaksift.iter_events"}[key]
        ratio = "" if key == "raw" else (
            f"   ratio vs raw pyarrow: {r['raw'] / r[key]:.2f} (wall), "
            f"{r['cpu_raw'] / r['cpu_' + key]:.2f} (user cpu)")
        print(f"  {label:<22} {r[key]:7.3f} s  {n / r[key] / 1e6:7.2f} M events/s  "
              f"user cpu {r['cpu_' + key]:6.3f} s{ratio}")


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--events", type=int, default=5_000_000, help="size of the generated set")
    p.add_argument("--repeat", type=int, default=3)
    p.add_argument("--chunk-events", type=int, default=500_000)
    p.add_argument("--demo", default=str(REPO_DIR / "demo_data" / "events_*.parquet"),
                   help="demo-sized data set (the dimuon demo files)")
    p.add_argument("--collection", default=None,
                   help="compare reading this one collection (raw side: pyarrow + numpy)")
    args = p.parse_args(argv)

    demo = Path(args.demo)
    with tempfile.TemporaryDirectory(prefix="peaksift-bench-") as tmp:
        if not any(demo.glob("*.parquet")):
            demo = Path(tmp) / "demo"
            simulate.write_demo(demo)
        _report(f"demo-sized set ({demo})", bench(demo, args.repeat, args.chunk_events,
                                                               args.collection))
        if args.events > 0:
            big = Path(tmp) / "big"
            t = time.perf_counter()
            files = max(1, args.events // 1_000_000)
            simulate.write_demo(big, n_events=args.events, files=files, row_group_events=100_000)
            print(f"(generated {args.events:,} events in {time.perf_counter() - t:.1f} s)")
            _report("generated set", bench(big, args.repeat, args.chunk_events,
                                           args.collection))
    return 0


if __name__ == "__main__":
    sys.exit(main())
