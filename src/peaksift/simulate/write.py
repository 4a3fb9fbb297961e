"""Writing the demo data set: Parquet event files (block by block, bounded memory), the
``truth.json`` record and the terminal summary, under the output-folder contract."""

from __future__ import annotations

import contextlib
import json
import os
from pathlib import Path
from typing import Any

import pyarrow as pa
import pyarrow.parquet as pq

from ..errors import InputError
from .blocks import _blocks, _check_size
from .scenario import (
    DEMO,
    DEMO_EVENTS,
    DEMO_SEED,
    GENERATOR_VERSION,
    INTENDED_SELECTION,
    PROCESSES,
    Scenario,
)


def _writer(path: Path, schema: pa.Schema) -> pq.ParquetWriter:
    """zstd, byte-stream-split floats and delta-coded integers: about half the plain size."""
    enc = {}
    for f in schema:
        t = f.type
        if pa.types.is_list(t) and pa.types.is_struct(t.value_type):
            for sub in t.value_type:
                enc[f"{f.name}.list.element.{sub.name}"] = (
                    "BYTE_STREAM_SPLIT" if pa.types.is_floating(sub.type) else "PLAIN")
        elif pa.types.is_list(t):
            enc[f"{f.name}.list.element"] = (
                "BYTE_STREAM_SPLIT" if pa.types.is_floating(t.value_type) else "PLAIN")
        elif pa.types.is_floating(t):
            enc[f.name] = "BYTE_STREAM_SPLIT"
        else:
            enc[f.name] = "DELTA_BINARY_PACKED"
    return pq.ParquetWriter(path, schema, compression="zstd", compression_level=9,
                            use_dictionary=False, column_encoding=enc)


def write_demo(
    outdir: str | os.PathLike,
    *,
    n_events: int | None = None,
    seed: int | None = None,
    weighted: bool = False,
    files: int = 2,
    row_group_events: int = 50_000,
    scenario: Scenario = DEMO,
    share_folder: bool = False,
) -> dict[str, Any]:
    """Write the demo data set to ``outdir``: Parquet event files and ``truth.json``.

    Events are generated and written block by block (:data:`BLOCK_EVENTS` at a time), so
    memory stays near 150 MB (resident) whatever ``n_events``.  Files are written into a
    staging folder inside ``outdir`` and moved into place when all are complete (the
    output-folder contract of :mod:`peaksift._output`).

    Parameters
    ----------
    outdir : path
        Created if missing.  Files are ``events_NNN.parquet`` (``simulated_NNN.parquet`` for
        the weighted variant) and ``truth.json``.  A folder holding files peaksift did not
        write is refused unless ``share_folder``; files of an earlier demo written there
        (listed in its ``peaksift-manifest.json``) are replaced, nothing else is touched.
    n_events, seed : int, optional
        Defaults :data:`DEMO_EVENTS` and :data:`DEMO_SEED`.
    weighted : bool
        The simulated-sample variant with per-event weights and generator truth.
    files : int
        Number of files the events are split into (contiguous, nearly equal).
    row_group_events : int
        Events per Parquet row group (the reader's chunk unit).
    share_folder : bool
        Write beside files peaksift did not write (they are never touched; a name clash
        with one of them is refused).

    Returns
    -------
    dict
        ``files`` (list of paths), ``truth`` (the truth record), ``truth_file``, ``summary``
        (a few lines for the terminal).
    """
    from .._output import staged_output

    n, s = _check_size(DEMO_EVENTS if n_events is None else n_events,
                       DEMO_SEED if seed is None else seed)
    if int(files) < 1:
        raise InputError(f"files must be 1 or more, got {files}")
    if int(files) > n:
        raise InputError(f"{n} event{'s' if n != 1 else ''} cannot fill {files} files: ask for "
                         f"at least {files} events (peaksift demo --events {files})")
    if int(row_group_events) < 1:
        raise InputError(f"row_group_events must be positive, got {row_group_events}")
    out = Path(outdir)
    stem = "simulated" if weighted else "events"
    names = [f"{stem}_{i:03d}.parquet" for i in range(files)]
    with staged_output(out, "demo", share=share_folder, names=[*names, "truth.json"]) as stage:
        assert stage is not None
        totals, weight_sum = _write_events(stage.path, names, n, s, scenario, weighted,
                                           int(row_group_events))
        paths = [out / nm for nm in names]
        truth = _truth(scenario, n, s, weighted, paths, row_group_events, totals, weight_sum)
        _json_file(stage.path / "truth.json", truth)
    return _demo_summary(out, paths, truth, n, s, weighted, scenario)


def _json_file(path: Path, obj: Any) -> None:
    from .._files import atomic_write

    atomic_write(path, json.dumps(obj, indent=2, sort_keys=False) + "\n")


def _write_events(folder: Path, names: list[str], n: int, s: int, scenario: Scenario,
                  weighted: bool, row_group_events: int
                  ) -> tuple[dict[str, dict[str, int]], dict[str, float]]:
    """Generate the events block by block into ``folder``/``names`` (nearly equal,
    contiguous parts); returns the per-process counts and sums of weights."""
    files = len(names)
    bounds = [round(i * n / files) for i in range(files + 1)]
    paths = [folder / nm for nm in names]
    totals: dict[str, dict[str, int]] = {}
    weight_sum: dict[str, float] = {}
    writers: list[pq.ParquetWriter | None] = [None] * files
    pending: list[list[pa.Table]] = [[] for _ in range(files)]
    pending_n = [0] * files
    try:
        pos = 0
        for table, stats in _blocks(n, s, scenario, weighted, False):
            for k, v in stats.items():
                t = totals.setdefault(k, dict.fromkeys(v, 0))
                for kk, vv in v.items():
                    t[kk] += vv
            if weighted:
                proc = table.column("process").to_numpy()
                w = table.column("weight").to_numpy()
                for i, p in enumerate(PROCESSES):
                    weight_sum[p] = weight_sum.get(p, 0.0) + float(w[proc == i].sum())
            start = pos
            pos += table.num_rows
            for f in range(files):
                a, b = max(bounds[f], start), min(bounds[f + 1], pos)
                if a >= b:
                    continue
                pending[f].append(table.slice(a - start, b - a))
                pending_n[f] += b - a
                while pending_n[f] >= row_group_events or (pending_n[f] and b == bounds[f + 1]):
                    chunk = pa.concat_tables(pending[f]).combine_chunks()
                    take = min(row_group_events, chunk.num_rows)
                    if writers[f] is None:
                        writers[f] = _writer(paths[f], chunk.schema)
                    writers[f].write_table(chunk.slice(0, take), row_group_size=take)
                    rest = chunk.slice(take)
                    pending[f] = [rest] if rest.num_rows else []
                    pending_n[f] = rest.num_rows
    finally:
        for w_ in writers:
            if w_ is not None:
                with contextlib.suppress(pa.ArrowException):
                    w_.close()
    return totals, weight_sum


def _demo_summary(out: Path, paths: list[Path], truth: dict[str, Any], n: int, s: int,
                  weighted: bool, scenario: Scenario) -> dict[str, Any]:
    files = len(paths)
    truth_path = out / "truth.json"
    size = sum(p.stat().st_size for p in paths)
    x = scenario.x
    summary = (
        f"wrote {files} file{'s' if files != 1 else ''} with {n} events ({size / 1e6:.1f} MB) "
        f"to {out}/: {', '.join(p.name for p in paths)}\n"
        f"{scenario.name}: sqrt(s) = {scenario.sqrt_s / 1000:g} TeV, "
        f"{'simulated sample with per-event weights' if weighted else 'unweighted data'}, "
        f"seed {s}\n"
        f"truth (masses, widths, yields, intended selection): {truth_path}\n"
        f"selection the demo was designed for: muon pairs, cut \"{INTENDED_SELECTION['cut']}\", "
        f"opposite charge, search window {INTENDED_SELECTION['search_window_gev'][0]:g}-"
        f"{INTENDED_SELECTION['search_window_gev'][1]:g} GeV "
        f"(calibration peak: Z0 at {scenario.z.mass:.4f} GeV; invented resonance: see "
        f"truth.json, {x.name.split('(')[0]})"
    )
    return {"files": [str(p) for p in paths], "truth": truth, "truth_file": str(truth_path),
            "summary": summary, "outdir": str(out)}


def _truth(sc: Scenario, n: int, seed: int, weighted: bool, paths: list[Path],
           row_group_events: int, totals: dict[str, dict[str, int]],
           weight_sum: dict[str, float]) -> dict[str, Any]:
    # BLOCK_EVENTS as the package attribute at call time, as the block loop reads it
    from .. import __version__
    from . import BLOCK_EVENTS

    fr = sc.weighted_fractions if weighted else sc.fractions
    tot = sum(fr.values())
    procs = {}
    descr = {
        "soft": "no hard process: fake leptons and soft tracks only",
        "z_mumu": "Z0 -> mu+ mu- (calibration peak)",
        "z_ee": "Z0 -> e+ e- (calibration peak)",
        "dy_mumu": "falling opposite-charge continuum with a broad shoulder -> mu+ mu-",
        "dy_ee": "falling opposite-charge continuum with a broad shoulder -> e+ e-",
        "x_mumu": f"invented resonance {sc.x.name} -> mu+ mu-",
    }
    for p in PROCESSES:
        d = {"description": descr[p], "fraction": fr[p] / tot,
             "expected_events": n * fr[p] / tot, **totals.get(p, {})}
        if weighted:
            d["sum_of_weights"] = weight_sum.get(p, 0.0)
        procs[p] = d
    return {
        "scenario": sc.name,
        "generator": GENERATOR_VERSION,
        "peaksift_version": __version__,
        "seed": seed,
        "n_events": n,
        "weighted": weighted,
        "block_events": BLOCK_EVENTS,
        "row_group_events": row_group_events,
        "files": [p.name for p in paths],
        "sqrt_s_gev": sc.sqrt_s,
        "calibration_peak": {
            "particle": sc.z.name, "pdgid": 23, "mass_gev": sc.z.mass, "width_gev": sc.z.width,
            "mass_range_gev": list(sc.z.mass_range),
            "source": "particle package (PDG tables)"},
        "invented_resonance": {
            "name": sc.x.name, "mass_gev": sc.x.mass, "width_gev": sc.x.width,
            "mass_range_gev": list(sc.x.mass_range), "decay": "mu+ mu-",
            "generated_events": procs["x_mumu"].get("generated", 0),
            "selected_in_search_window": procs["x_mumu"].get("selected_in_search_window", 0),
            "note": "invented for the demo; no known particle has this mass"},
        "lineshape": "relativistic Breit-Wigner f(m) ~ 1/((m^2 - M^2)^2 + M^2 Gamma^2), "
                     "truncated to mass_range",
        "continuum": {"mass_range_gev": list(sc.continuum_range),
                      "shape": "dN/dm ~ (1 - f) (1 - m/sqrt_s)^a / (m/sqrt_s)^b + f shoulder(m), "
                               "each term normalised on mass_range; shoulder: log-normal in m "
                               "with mode m0 and log-width ln(1 + r)",
                      "a": sc.continuum_a, "b": sc.continuum_b,
                      "f": sc.continuum_shoulder_fraction, "m0": sc.continuum_shoulder_mass,
                      "r": sc.continuum_shoulder_width},
        "processes": procs,
        "intended_selection": INTENDED_SELECTION,
        "columns": {
            "muon, electron": "list<struct<pt, eta, phi, mass (float32, GeV), charge (int8), "
                              "isolation (float32, relative)>>",
            "track.pt, track.eta, track.phi, track.charge": "sibling list columns, no mass "
                                                            "(massless)",
            "run, event, n_vertices": "per event",
            **({"weight, process, true_mass": "per event (simulated-sample variant)"}
               if weighted else {})},
        "parameters": sc.to_dict(),
    }
