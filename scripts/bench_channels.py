"""Benchmark: the scan of two channels combined against the scan of one, and the signal
model from five simulated samples.

1. ``combine([one channel])`` (which is exactly ``peaksift.scan``) against
   ``combine([two channels])`` on 400-bin spectra of 60,000 events each (Gaussian signal of
   1% resolution on an exponential background, 121 mass hypotheses, the free refit at the
   best mass included).  The two are alternated in rounds; best and median of each are
   printed with their ratio (target: two channels <= 2.2 x one).
2. :func:`peaksift.stats.signal_model.signal_model` from 5 samples of 100,000 selected
   candidates each (double-sided Crystal Ball, the default; target <= 10 s).
3. Reading a shared input once for several channels
   (:func:`peaksift.execution.collect_shared`) against one read per channel (serial engine,
   the demo's events): the dimuon and dielectron channels (different collections), and two
   categories of the dimuon selection (both muons central or not; one collection).
4. With ``--events DIR``: the demo's dimuon signal model (``demo_data/dimuon.toml``) from 5
   simulated samples of 100,000 *events* each (written to DIR once by the demo generator),
   read, selected and paired by the search's own code (``search_signal_model``).

    python scripts/bench_channels.py [--repeat 5]
"""

from __future__ import annotations

import argparse
import os
import statistics
import time

import numpy as np
from scipy import stats

from peaksift import MassHistogram, Resolution
from peaksift.stats.channels import Channel, combine
from peaksift.stats.signal_model import SignalSample, signal_model


def _spectrum(seed: int) -> MassHistogram:
    rng = np.random.default_rng(seed)
    x = 100.0 + rng.exponential(60.0, 60_000)
    x = np.concatenate([x[x < 300.0], rng.normal(180.0, 1.8, 200)])
    return MassHistogram.from_masses(x, bins=400, range=(100.0, 300.0))


def _channel(name: str, seed: int) -> Channel:
    return Channel(name, _spectrum(seed), "exponential", 20.0, signal="gaussian",
                   resolution=Resolution.relative(0.01), efficiency=0.5)


def bench_scan(repeat: int) -> None:
    a, b = _channel("first", 1), _channel("second", 2)
    masses = np.linspace(110.0, 290.0, 121)
    combine([a], masses)  # warm-up (imports, caches)
    one, two = [], []
    for _ in range(repeat):
        t = time.process_time()
        combine([a], masses)
        one.append(time.process_time() - t)
        t = time.process_time()
        combine([a, b], masses)
        two.append(time.process_time() - t)
    print(f"scan, one channel : best {min(one):.3f} s, median {statistics.median(one):.3f} s "
          "(CPU)")
    print(f"scan, two channels: best {min(two):.3f} s, median {statistics.median(two):.3f} s "
          "(CPU)")
    print(f"ratio two/one: best {min(two) / min(one):.2f}, median "
          f"{statistics.median(two) / statistics.median(one):.2f} (target <= 2.2); load "
          f"{os.getloadavg()[0]:.1f} on {os.cpu_count()} cores")


def bench_shared_read(repeat: int) -> None:
    import dataclasses
    import warnings
    from pathlib import Path

    from peaksift.config import load_config
    from peaksift.errors import DataWarning
    from peaksift.execution import collect, collect_shared
    from peaksift.search.common import _read_window, _selection

    demo = Path(__file__).resolve().parent.parent / "demo_data"
    cfgs = [load_config(demo / f"{n}.toml") for n in ("dimuon", "dielectron")]
    files = list(cfgs[0].input.files)
    channels = [_selection(c, *_read_window(c)) for c in cfgs]
    mu = channels[0]
    central = "pt > 20 and abs(eta) < 1.2 and isolation < 0.15"
    forward = "pt > 20 and abs(eta) >= 1.2 and abs(eta) < 2.4 and isolation < 0.15"
    categories = [dataclasses.replace(mu, cut=central), dataclasses.replace(mu, cut=forward)]
    for label, sels in (("dimuon + dielectron", channels),
                        ("two dimuon categories", categories)):
        apart, once = [], []
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", DataWarning)
            collect_shared(files, sels)  # warm-up
            for _ in range(repeat):
                t = time.process_time()
                for s in sels:
                    collect(files, s)
                apart.append(time.process_time() - t)
                t = time.process_time()
                collect_shared(files, sels)
                once.append(time.process_time() - t)
        print(f"read {label}: one read per channel best {min(apart):.3f} s, median "
              f"{statistics.median(apart):.3f} s; one shared read best {min(once):.3f} s, "
              f"median {statistics.median(once):.3f} s (CPU): ratio shared/apart best "
              f"{min(once) / min(apart):.2f}, median "
              f"{statistics.median(once) / statistics.median(apart):.2f}; load "
              f"{os.getloadavg()[0]:.1f}")


def bench_signal_model() -> None:
    samples = []
    for k, m in enumerate((100.0, 150.0, 200.0, 250.0, 300.0)):
        rng = np.random.default_rng(100 + k)
        core = rng.normal(0.0, 1.0, 100_000)
        low = -stats.crystalball.rvs(1.3, 4.0, size=100_000, random_state=rng)
        tails = np.where(rng.random(100_000) < 0.5, -low, low)
        x = m + 0.01 * m * np.where(rng.random(100_000) < 0.7, core, tails)
        samples.append(SignalSample(m, x, 180_000))
    t0, c0 = time.perf_counter(), time.process_time()
    sm = signal_model(samples)
    print(f"signal model from 5 x 100k candidates: {time.perf_counter() - t0:.2f} s wall, "
          f"{time.process_time() - c0:.2f} s CPU (target <= 10 s); {sm!r}")


def bench_signal_model_from_events(folder: str) -> None:
    import dataclasses
    from pathlib import Path

    import pyarrow.parquet as pq

    from peaksift import simulate
    from peaksift.config import load_config
    from peaksift.search.signal import search_signal_model

    demo = Path(__file__).resolve().parent.parent / "demo_data"
    cfg = load_config(demo / "dimuon.toml")
    out = Path(folder)
    out.mkdir(parents=True, exist_ok=True)
    files = []
    for k, m in enumerate(cfg.signal_model.masses):
        path = out / f"signal_muon_{m:g}_100k.parquet"
        if not path.exists():
            table, _ = simulate.generate_signal_sample(m, "muon", 100_000, seed=700 + k)
            pq.write_table(table, path)
        files.append(str(path))
    # 100k-event samples resolve the resolution's curvature and the efficiency's turn-on
    # that the demo's orders (1 and 2, enough for its 10k-event samples) miss
    cfg = dataclasses.replace(cfg, signal_model=dataclasses.replace(
        cfg.signal_model, files=tuple(files), generated=(100_000.0,) * len(files),
        raise_order=True))
    t0, c0 = time.perf_counter(), time.process_time()
    sm = search_signal_model(cfg)
    print(f"signal model from 5 x 100k events (read, select, pair, fit; serial engine): "
          f"{time.perf_counter() - t0:.2f} s wall, {time.process_time() - c0:.2f} s CPU "
          f"(target <= 10 s); load {os.getloadavg()[0]:.1f}; {sm!r}; orders "
          f"{ {k: p['order'] for k, p in sm.polynomials.items()} }")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=11)
    ap.add_argument("--events", default=None,
                    help="folder for 5 x 100k-event signal samples (generated once)")
    args = ap.parse_args()
    bench_scan(args.repeat)
    bench_shared_read(max(3, args.repeat // 3))
    bench_signal_model()
    if args.events:
        bench_signal_model_from_events(args.events)


if __name__ == "__main__":
    main()
