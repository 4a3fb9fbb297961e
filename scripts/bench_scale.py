"""Benchmark of the execution engines: events/s, speed-up over serial, peak memory.

Generates a demo data set (default 20M events) into a temporary directory with the demo
generator (generation time is reported on its own and not counted), then runs the same
selection with ``collect`` on each engine, each in a fresh Python process so that its
memory is measured alone.  For each engine it prints:

* events/s (events read / wall time of ``collect``, which includes planning the chunks,
  numba's first-call set-up, and starting the process pool or the local Dask cluster; not
  the import of peaksift's own modules, which comes first and costs every engine the same,
  and is printed on its own); ``dask-running`` is Dask given a
  scheduler address, on a cluster started before the timed run (its workers spawned, fresh
  interpreters that have not run peaksift yet), as a real cluster would be;
* the speed-up over ``serial`` measured in the same run (targets on a 2-core machine:
  ``processes`` >= 1.6x and ``dask`` >= 1.5x with two workers);
* the peak resident memory of the whole process tree (the run's process plus its pool or
  Dask workers and nannies), sampled every 50 ms with psutil (target: < 1.5 GiB);
* a digest of the result, which must be the same for every engine.

Usage::

    python scripts/bench_scale.py                      # 20M events, all engines
    python scripts/bench_scale.py --events 2000000     # a quick run
    python scripts/bench_scale.py --data DIR           # reuse (or keep) generated files
    python scripts/bench_scale.py --start-method spawn # workers as fresh interpreters
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
EXISTING = "dask-running"  # Dask on a cluster that is already up when the run starts
TARGETS = {"processes": 1.6, "dask": 1.5, EXISTING: 1.5}
RSS_LIMIT = 1.5 * GIB


def _selection(args: argparse.Namespace):
    import numpy as np

    from peaksift.execution import Selection

    return Selection(first=args.first, edges=np.linspace(args.lo, args.hi, args.bins + 1),
                     window=(args.lo, args.hi), cut=args.cut or None, charge="opposite",
                     choose=args.choose)


def _digest(col) -> str:
    h = hashlib.sha256()
    for a in (col.histogram.weight_sum, col.histogram.weight_sq_sum, col.window_mass, col.window_weight):
        h.update(a.tobytes())
    h.update(json.dumps(col.cutflow, sort_keys=True).encode())
    return h.hexdigest()[:16]


def _files(data: Path, first: int | None) -> list[str]:
    files = sorted(str(p) for p in data.rglob("*.parquet"))
    return files[:first] if first else files


def _child(args: argparse.Namespace) -> None:
    """Run one engine and print its figures as JSON (runs in a fresh process)."""
    t_import = time.perf_counter()
    # the library itself, as in any session that uses it: the same for every engine, so
    # not timed (what each engine adds -- worker processes, their imports, numba's
    # first-call set-up in this process and in workers, distributed -- is timed)
    import peaksift.events
    import peaksift.pairing  # noqa: F401
    from peaksift.execution import collect

    t_import = time.perf_counter() - t_import

    sel = _selection(args)
    cluster = None
    engine, address = args.child, None
    if engine == EXISTING:  # a running cluster, as a real one would be: started untimed
        from peaksift.execution._dask import _start_local_cluster

        # spawned, like the worker processes of a real cluster (not forked from this one)
        cluster = _start_local_cluster(args.workers, start_method="spawn")
        engine, address = "dask", cluster.scheduler_address
    import resource

    def cpu_now() -> float:
        return sum(u.ru_utime + u.ru_stime for u in (resource.getrusage(resource.RUSAGE_SELF),
                                                     resource.getrusage(resource.RUSAGE_CHILDREN)))

    try:
        c0 = cpu_now()
        t0 = time.perf_counter()
        col = collect(_files(args.data, args.first_files), sel, engine=engine,
                      workers=args.workers, address=address, chunk_events=args.chunk_events,
                      start_method=args.start_method)
        seconds = time.perf_counter() - t0
        cpu_timed = cpu_now() - c0  # worker processes count once reaped (a running
        # cluster's workers are not: None below)
    finally:
        if cluster is not None:
            cluster.close()
    print(json.dumps({
        "engine": args.child, "seconds": seconds, "import": t_import,
        "cores": None if cluster is not None else cpu_timed / seconds,
        "events": col.events_read,
        "candidates": col.candidates, "window": int(col.window_mass.size),
        "chunks": col.engine_info["chunks"], "digest": _digest(col),
        "busy": col.engine_info["chunk_seconds"] / (seconds * col.engine_info["workers"]),
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


def _busy_cpu_seconds() -> float | None:
    """CPU seconds the whole machine has spent busy since boot (Linux /proc/stat)."""
    try:
        fields = Path("/proc/stat").read_text().split("\n", 1)[0].split()[1:]
    except OSError:
        return None
    user, nice, system, _idle, _iowait, irq, softirq, steal = (int(x) for x in fields[:8])
    return (user + nice + system + irq + softirq + steal) / os.sysconf("SC_CLK_TCK")


def _run_engine(engine: str, args: argparse.Namespace, first_files: int = 0) -> dict:
    cmd = [sys.executable, __file__, "--child", engine, "--data", str(args.data),
           "--first-files", str(first_files),
           "--workers", str(args.workers), "--chunk-events", str(args.chunk_events),
           "--start-method", args.start_method,
           "--first", args.first, "--cut", args.cut, "--choose", args.choose,
           "--lo", str(args.lo), "--hi", str(args.hi), "--bins", str(args.bins)]
    import resource

    usage0 = resource.getrusage(resource.RUSAGE_CHILDREN)
    busy0 = _busy_cpu_seconds()
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
    busy1 = _busy_cpu_seconds()
    usage1 = resource.getrusage(resource.RUSAGE_CHILDREN)
    stop.set()
    if sampler is not None:
        sampler.join()
    if child.returncode != 0:
        raise SystemExit(f"engine {engine} failed with exit code {child.returncode}")
    res = json.loads(out.strip().splitlines()[-1])
    if sampler is None:
        peak[0] = usage1.ru_maxrss * 1024
    # CPU of the run's whole process tree (children are reaped by then), and what the rest
    # of the machine used meanwhile: a busy machine makes the ratios meaningless
    ours = (usage1.ru_utime + usage1.ru_stime) - (usage0.ru_utime + usage0.ru_stime)
    res["cpu"] = ours
    res["cpu_others"] = None if busy0 is None else max(0.0, (busy1 - busy0) - ours)
    res["peak_rss"] = peak[0]
    res["rss_method"] = method
    return res


def _generate(outdir: Path, n_events: int, seed: int, files: int) -> float:
    from peaksift.simulate import write_demo

    t0 = time.perf_counter()
    write_demo(outdir, n_events=n_events, seed=seed, files=files)
    return time.perf_counter() - t0


def _best(runs: list[dict]) -> dict:
    """The fastest of an engine's runs, with the median time and the largest peak RSS."""
    import statistics

    best = dict(min(runs, key=lambda r: r["seconds"]))
    best["median"] = statistics.median(r["seconds"] for r in runs)
    best["peak_rss"] = max(r["peak_rss"] for r in runs)
    return best


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--events", type=int, default=20_000_000, help="events to generate")
    ap.add_argument("--seed", type=int, default=2026)
    ap.add_argument("--data", type=Path, default=None,
                    help="directory of event files: reused if it holds Parquet files, "
                         "else generated there and kept")
    ap.add_argument("--files", type=int, default=8, help="files to generate")
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--chunk-events", type=int, default=None)
    ap.add_argument("--engines", default=f"serial,processes,dask,{EXISTING}",
                    help=f"{EXISTING}: Dask with a scheduler address, on a two-worker cluster "
                         "started before the timed run (its workers have not run peaksift "
                         "yet), as when pointing at a real cluster")
    ap.add_argument("--start-method", default="auto", choices=("auto", "fork", "spawn"),
                    help="how the pool's and the local cluster's worker processes start "
                         "(auto: fork on Linux)")
    ap.add_argument("--repeat", type=int, default=3,
                    help="rounds; each round runs every engine once, in turn, so a slow spell "
                         "of a shared machine does not fall on one engine only (best and "
                         "median times are reported)")
    ap.add_argument("--no-marginal", action="store_true",
                    help="skip the second, smaller run that separates start-up cost from "
                         "throughput")
    # defaults: the demo search (demo_data/search.toml), its search and calibration windows
    ap.add_argument("--first", default="muon", help="collection to pair")
    ap.add_argument("--cut", default="pt > 20 and abs(eta) < 2.4 and isolation < 0.15")
    ap.add_argument("--choose", default="leading")
    ap.add_argument("--lo", type=float, default=70.0)
    ap.add_argument("--hi", type=float, default=200.0)
    ap.add_argument("--bins", type=int, default=130)
    ap.add_argument("--child", default=None, help=argparse.SUPPRESS)
    ap.add_argument("--first-files", type=int, default=0, help=argparse.SUPPRESS)
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
    engines = [e.strip() for e in args.engines.split(",") if e.strip()]
    full: dict[str, dict] = {}
    small: dict[str, dict] = {}
    try:
        have = _files(args.data, None) if args.data.is_dir() else []
        if have:
            print(f"data: reusing {len(have)} files in {args.data}")
        else:
            print(f"generating {args.events:,} demo events into {args.data} ...", flush=True)
            gen = _generate(args.data, args.events, args.seed, args.files)
            print(f"generation: {gen:.1f} s (not counted)")
            have = _files(args.data, None)
        n_small = max(1, len(have) // 4) if len(have) >= 2 and not args.no_marginal else 0
        print(f"cpus: {os.cpu_count()}, workers: {args.workers}, chunk_events: "
              f"{args.chunk_events:,}, files: {len(have)}, start method: "
              f"{args.start_method}", flush=True)
        runs: dict[str, list[dict]] = {e: [] for e in engines}
        runs_small: dict[str, list[dict]] = {e: [] for e in engines}
        for rnd in range(max(1, args.repeat)):
            for engine in engines:
                runs[engine].append(_run_engine(engine, args))
                if n_small:
                    runs_small[engine].append(_run_engine(engine, args, n_small))
            print(f"round {rnd + 1}: " + ", ".join(
                f"{e} {runs[e][-1]['seconds']:.2f} s" for e in engines), flush=True)
        for engine in engines:
            r = full[engine] = _best(runs[engine])
            others = "" if r["cpu_others"] is None else \
                f", other processes {r['cpu_others']:.1f} CPU s"
            cores = "" if r["cores"] is None else f", {r['cores']:.2f} cores in use"
            print(f"  {engine:<12} {r['events'] / r['seconds']:>11,.0f} events/s  "
                  f"(best {r['seconds']:.2f} s, median {r['median']:.2f} s, {r['chunks']} "
                  f"chunks, workers busy {100 * r['busy']:.0f}%{cores}; run "
                  f"{r['cpu']:.1f} CPU s{others})  peak RSS {r['peak_rss'] / GIB:.2f} GiB  "
                  f"digest {r['digest']}", flush=True)
            if n_small:
                q = small[engine] = _best(runs_small[engine])
                print(f"  {'':<12} {q['events']:,} events ({n_small} of {len(have)} files): "
                      f"best {q['seconds']:.2f} s", flush=True)
    finally:
        if tmp is not None:
            tmp.cleanup()

    ok = True
    print()
    first = next(iter(full.values()))
    print(f"events: {first['events']:,}, candidates: {first['candidates']:,}, "
          f"in window: {first['window']:,}")
    print(f"peaksift import before each timed run (every engine alike, not counted): "
          f"{min(r['import'] for r in full.values()):.2f}-"
          f"{max(r['import'] for r in full.values()):.2f} s")
    same = len({r["digest"] for r in full.values()}) == 1
    ok &= same
    print(f"identical results on every engine: {'yes' if same else 'NO'}")
    if "serial" in full:
        base = full["serial"]["events"] / full["serial"]["seconds"]
        for engine, target in TARGETS.items():
            if engine in full:
                ratio = full[engine]["events"] / full[engine]["seconds"] / base
                med = full["serial"]["median"] / full[engine]["median"]
                passed = ratio >= target
                ok &= passed
                print(f"{engine} / serial: {ratio:.2f}x end to end, best times (medians: "
                      f"{med:.2f}x)  (target >= {target}x with {args.workers} workers: "
                      f"{'met' if passed else 'NOT met'})")
    if small:
        # marginal throughput = extra events / extra time between the small and the full run;
        # what is left of the small run's time is the fixed start-up cost
        print("start-up cost and throughput once running (from the two data-set sizes):")
        marg = {}
        for engine in engines:
            de = full[engine]["events"] - small[engine]["events"]
            dt = full[engine]["seconds"] - small[engine]["seconds"]
            if de > 0 and dt > 0:
                marg[engine] = de / dt
                fixed = small[engine]["seconds"] - small[engine]["events"] / marg[engine]
                print(f"  {engine:<12} {marg[engine]:>11,.0f} events/s once running, start-up "
                      f"~{fixed:.2f} s")
        if "serial" in marg:
            for engine in TARGETS:
                if engine in marg:
                    print(f"  {engine} / serial once running: "
                          f"{marg[engine] / marg['serial']:.2f}x")
    for engine, r in full.items():
        passed = r["peak_rss"] < RSS_LIMIT
        ok &= passed
        print(f"peak RSS {engine}: {r['peak_rss'] / GIB:.2f} GiB ({r['rss_method']}; "
              f"limit 1.5 GiB: {'met' if passed else 'NOT met'})")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
