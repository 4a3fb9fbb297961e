"""Benchmark of the execution engines: events/s, speed-up over serial, peak memory.

Generates a demo data set (default 20M events) into a temporary directory with the demo
generator (generation time is reported on its own and not counted), then runs the same
selection with ``collect`` on each engine, each in a fresh Python process so that its
memory is measured alone.  For each engine it prints:

* events/s (events read / wall time of ``collect``, which includes starting the process
  pool or the local Dask cluster and planning the chunks);
* the speed-up over ``serial`` measured in the same run (targets on a 2-core machine:
  ``processes`` >= 1.6x and ``dask`` >= 1.5x with two workers);
* the peak resident memory of the whole process tree (the run's process plus its pool or
  Dask workers and nannies), sampled every 50 ms with psutil (target: < 1.5 GiB);
* a digest of the result, which must be the same for every engine.

Usage::

    python scripts/bench_scale.py                      # 20M events, all engines
    python scripts/bench_scale.py --events 2000000     # a quick run
    python scripts/bench_scale.py --data DIR           # reuse (or keep) generated files
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

GIB = 1024**3
TARGETS = {"processes": 1.6, "dask": 1.5}
RSS_LIMIT = 1.5 * GIB


def _selection(args: argparse.Namespace):
    import numpy as np

    from peaksift.execution import Selection

    return Selection(first=args.first, edges=np.linspace(args.lo, args.hi, args.bins + 1),
                     window=(args.lo, args.hi), cut=args.cut or None, charge="opposite")


def _digest(col) -> str:
    h = hashlib.sha256()
    for a in (col.histogram.sumw, col.histogram.sumw2, col.window_mass, col.window_weight):
        h.update(a.tobytes())
    h.update(json.dumps(col.cutflow, sort_keys=True).encode())
    return h.hexdigest()[:16]


def _child(args: argparse.Namespace) -> None:
    """Run one engine and print its figures as JSON (runs in a fresh process)."""
    from peaksift.execution import collect

    sel = _selection(args)
    t0 = time.perf_counter()
    col = collect(args.data, sel, engine=args.child, workers=args.workers,
                  chunk_events=args.chunk_events)
    seconds = time.perf_counter() - t0
    print(json.dumps({
        "engine": args.child, "seconds": seconds, "events": col.events_read,
        "candidates": col.candidates, "window": int(col.window_mass.size),
        "chunks": col.engine_info["chunks"], "digest": _digest(col),
    }))


def _tree_rss(proc) -> int:
    import psutil

    total = 0
    for p in [proc, *proc.children(recursive=True)]:
        try:
            total += p.memory_info().rss
        except (psutil.NoSuchProcess, psutil.AccessDenied):
            pass
    return total


def _run_engine(engine: str, args: argparse.Namespace) -> dict:
    cmd = [sys.executable, __file__, "--child", engine, "--data", str(args.data),
           "--workers", str(args.workers), "--chunk-events", str(args.chunk_events),
           "--first", args.first, "--cut", args.cut, "--lo", str(args.lo), "--hi", str(args.hi),
           "--bins", str(args.bins)]
    child = subprocess.Popen(cmd, stdout=subprocess.PIPE, text=True)
    peak = [0]
    stop = threading.Event()
    try:
        import psutil

        proc = psutil.Process(child.pid)

        def sample() -> None:
            while not stop.is_set():
                try:
                    peak[0] = max(peak[0], _tree_rss(proc))
                except psutil.NoSuchProcess:
                    return
                stop.wait(0.05)

        sampler = threading.Thread(target=sample, daemon=True)
        sampler.start()
        method = "psutil, process tree"
    except ImportError:  # pragma: no cover - psutil ships with distributed
        sampler = None
        method = "getrusage, largest single process"
    out, _ = child.communicate()
    stop.set()
    if sampler is not None:
        sampler.join()
    if child.returncode != 0:
        raise SystemExit(f"engine {engine} failed with exit code {child.returncode}")
    res = json.loads(out.strip().splitlines()[-1])
    if sampler is None:
        import resource

        peak[0] = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss * 1024
    res["peak_rss"] = peak[0]
    res["rss_method"] = method
    return res


def _generate(outdir: Path, n_events: int, seed: int) -> float:
    from peaksift.simulate import write_demo

    t0 = time.perf_counter()
    write_demo(outdir, n_events=n_events, seed=seed)
    return time.perf_counter() - t0


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--events", type=int, default=20_000_000, help="events to generate")
    ap.add_argument("--seed", type=int, default=2026)
    ap.add_argument("--data", type=Path, default=None,
                    help="directory of event files: reused if it holds Parquet files, "
                         "else generated there and kept")
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--chunk-events", type=int, default=None)
    ap.add_argument("--engines", default="serial,processes,dask")
    ap.add_argument("--first", default="muon", help="collection to pair")
    ap.add_argument("--cut", default="pt > 5 and abs(eta) < 2.4")
    ap.add_argument("--lo", type=float, default=2.0)
    ap.add_argument("--hi", type=float, default=150.0)
    ap.add_argument("--bins", type=int, default=740)
    ap.add_argument("--child", default=None, help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.chunk_events is None:
        from peaksift.execution import DEFAULT_CHUNK_EVENTS

        args.chunk_events = DEFAULT_CHUNK_EVENTS
    if args.child:
        _child(args)
        return 0

    tmp = None
    if args.data is None:
        tmp = tempfile.TemporaryDirectory(prefix="peaksift_bench_")
        args.data = Path(tmp.name)
    try:
        have = sorted(args.data.rglob("*.parquet")) if args.data.is_dir() else []
        if have:
            print(f"data: reusing {len(have)} files in {args.data}")
        else:
            print(f"generating {args.events:,} demo events into {args.data} ...", flush=True)
            gen = _generate(args.data, args.events, args.seed)
            print(f"generation: {gen:.1f} s (not counted)")
        print(f"cpus: {os.cpu_count()}, workers: {args.workers}, chunk_events: "
              f"{args.chunk_events:,}", flush=True)
        results = {}
        for engine in [e.strip() for e in args.engines.split(",") if e.strip()]:
            r = _run_engine(engine, args)
            results[engine] = r
            print(f"  {engine:<10} {r['events'] / r['seconds']:>12,.0f} events/s  "
                  f"({r['seconds']:.1f} s, {r['chunks']} chunks)  peak RSS "
                  f"{r['peak_rss'] / GIB:.2f} GiB  digest {r['digest']}", flush=True)
    finally:
        if tmp is not None:
            tmp.cleanup()

    ok = True
    print()
    first = next(iter(results.values()))
    print(f"events: {first['events']:,}, candidates: {first['candidates']:,}, "
          f"in window: {first['window']:,}")
    same = len({r["digest"] for r in results.values()}) == 1
    ok &= same
    print(f"identical results on every engine: {'yes' if same else 'NO'}")
    if "serial" in results:
        base = results["serial"]["events"] / results["serial"]["seconds"]
        for engine, target in TARGETS.items():
            if engine in results:
                ratio = results[engine]["events"] / results[engine]["seconds"] / base
                passed = ratio >= target
                ok &= passed
                print(f"{engine} / serial: {ratio:.2f}x  (target >= {target}x with "
                      f"{args.workers} workers: {'met' if passed else 'NOT met'})")
    for engine, r in results.items():
        passed = r["peak_rss"] < RSS_LIMIT
        ok &= passed
        print(f"peak RSS {engine}: {r['peak_rss'] / GIB:.2f} GiB ({r['rss_method']}; "
              f"limit 1.5 GiB: {'met' if passed else 'NOT met'})")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
