"""Reading Parquet events: layouts, coordinate systems, chunking, describe, bad input."""

from __future__ import annotations

import pickle
import warnings

import awkward as ak
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import vector

from peaksift import events
from peaksift.cli import main as cli_main
from peaksift.errors import DataWarning, InputError

N_EVENTS = 400


def _truth_objects(seed: int = 3):
    rng = np.random.default_rng(seed)
    counts = rng.poisson(2.0, N_EVENTS)
    tot = int(counts.sum())
    return counts, {
        "pt": rng.uniform(5, 80, tot), "eta": rng.uniform(-2.4, 2.4, tot),
        "phi": rng.uniform(-np.pi, np.pi, tot), "mass": rng.uniform(0.0, 5.0, tot),
        "charge": rng.choice([-1, 1], tot).astype(np.int8), "isolation": rng.uniform(0, 1, tot),
    }


def _cartesian(obj):
    # components from the vector package (outside peaksift)
    v = vector.array({"pt": obj["pt"], "eta": obj["eta"], "phi": obj["phi"],
                      "mass": obj["mass"]})
    return {"px": v.px, "py": v.py, "pz": v.pz, "energy": v.E,
            "charge": obj["charge"], "isolation": obj["isolation"]}


def _write(path, counts, obj, layout, name="muon", extra_cols=None, row_group_size=None):
    off = pa.array(np.concatenate([[0], np.cumsum(counts)]).astype(np.int32))
    cols = {}
    if layout == "records":
        st = pa.StructArray.from_arrays([pa.array(v) for v in obj.values()], list(obj))
        cols[name] = pa.ListArray.from_arrays(off, st)
    else:
        for k, v in obj.items():
            cols[f"{name}.{k}"] = pa.ListArray.from_arrays(off, pa.array(v))
    cols["weight"] = pa.array(np.linspace(0.5, 1.5, len(counts)))
    cols.update(extra_cols or {})
    pq.write_table(pa.table(cols), path, row_group_size=row_group_size)
    return path


@pytest.mark.parametrize("layout", ["records", "columns"])
@pytest.mark.parametrize("coords", ["polar", "cartesian"])
def test_round_trip_layouts_and_coordinates(tmp_path, layout, coords):
    counts, obj = _truth_objects()
    stored = obj if coords == "polar" else _cartesian(obj)
    path = _write(tmp_path / "ev.parquet", counts, stored, layout, row_group_size=150)
    ev = events.read_events(path)
    assert ev.fields == ["muon", "weight"]
    mu = ev.muon
    assert mu.fields[:4] == ["pt", "eta", "phi", "mass"]
    assert {"charge", "isolation"} <= set(mu.fields)
    np.testing.assert_array_equal(ak.num(mu), counts)
    for k in ("pt", "eta", "phi"):
        np.testing.assert_allclose(ak.flatten(mu[k]), obj[k], rtol=1e-9, atol=1e-9)
    # masses up to 5 GeV on momenta up to ~900 GeV: the cartesian round trip loses
    # digits in E^2 - p^2 (common practice), so compare at the float64 rounding scale
    p_max = float(np.max(obj["pt"] * np.cosh(obj["eta"])))
    np.testing.assert_allclose(ak.flatten(mu.mass), obj["mass"], atol=1e-12 * p_max**2)
    np.testing.assert_array_equal(ak.flatten(mu.charge), obj["charge"])
    np.testing.assert_allclose(ev.weight, np.linspace(0.5, 1.5, N_EVENTS))
    # Momentum4D behaviour: the pair mass agrees with vector computing on the raw numbers
    two = mu[ak.num(mu) >= 2]
    m_pair = (two[:, 0] + two[:, 1]).mass
    idx = np.flatnonzero(counts >= 2)
    starts = np.concatenate([[0], np.cumsum(counts)])[idx]
    a = vector.array({k: obj[k][starts] for k in ("pt", "eta", "phi", "mass")})
    b = vector.array({k: obj[k][starts + 1] for k in ("pt", "eta", "phi", "mass")})
    np.testing.assert_allclose(ak.to_numpy(m_pair), (a + b).mass, rtol=1e-7)


def test_massless_default_and_given_mass(tmp_path):
    counts, obj = _truth_objects()
    obj = {k: v for k, v in obj.items() if k != "mass"}
    path = _write(tmp_path / "t.parquet", counts, obj, "columns", name="track")
    ev = events.read_events(path)
    assert np.all(ak.flatten(ev.track.mass) == 0.0)
    ev = events.read_events(path, masses={"track": 0.13957})
    assert np.all(ak.flatten(ev.track.mass) == pytest.approx(0.13957))


def test_chunks_concatenate_to_the_whole(small_demo):
    whole = events.read_events(small_demo)
    specs = events.plan_chunks(small_demo, chunk_events=5000)
    assert sum(s.n_events for s in specs) == len(whole) == 20_000
    assert [s.first_event for s in specs] == list(np.cumsum([0] + [s.n_events for s in specs])[:-1])
    assert all(s.n_events >= 5000 or s == specs[-1] or specs[specs.index(s) + 1].path != s.path
               for s in specs)
    spec = pickle.loads(pickle.dumps(specs[2]))
    part = events.read_chunk(spec)
    assert ak.array_equal(part, whole[spec.first_event:spec.first_event + spec.n_events])
    chunks = list(events.iter_events(small_demo, chunk_events=5000))
    assert len(chunks) == len(specs)
    assert ak.array_equal(ak.concatenate(chunks), whole)
    # collections and field selection
    sub = events.read_events(small_demo, "muon", fields=["charge"])
    assert sub.fields == ["muon"]  # event columns only when named (weight always)
    assert sub.muon.fields == ["pt", "eta", "phi", "mass", "charge"]


def test_describe_content(small_demo):
    d = events.describe(small_demo)
    text = str(d)
    ev = events.read_events(small_demo)
    assert "2 files, 20000 events" in text
    assert "events_000.parquet" in text and "events_001.parquet" in text
    assert "muon: one list-of-struct column" in text
    assert "track: sibling columns track.<field>" in text and "massless" in text
    assert "isolation float32" in text and "charge int8" in text
    assert "n_vertices (int16)" in text
    assert d.collections["muon"]["mean"] == pytest.approx(float(ak.mean(ak.num(ev.muon))))
    assert d.collections["muon"]["max"] == int(ak.max(ak.num(ev.muon)))
    assert sum(d.collections["track"]["multiplicity"].values()) == 20_000
    assert f"mean {d.collections['muon']['mean']:.2f}" in text


def test_cli_inspect(small_demo, capsys):
    assert cli_main(["inspect", str(small_demo)]) == 0
    assert "collections:" in capsys.readouterr().out
    assert cli_main(["inspect", str(small_demo / "nothing_*.parquet")]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "no file matches the glob" in err


def test_list_files(tmp_path):
    counts, obj = _truth_objects()
    for name in ("b.parquet", "a.parquet"):
        _write(tmp_path / name, counts, obj, "records")
    files = events.list_files([tmp_path, tmp_path / "a.parquet", str(tmp_path / "*.parquet")])
    assert [f.name for f in files] == ["a.parquet", "b.parquet"]


# ----------------------------------------------------------------------------- bad input


def test_no_file_matches(tmp_path):
    with pytest.raises(InputError, match=r"no file matches the glob '.*\*\.parquet'"):
        events.read_events(str(tmp_path / "*.parquet"))
    with pytest.raises(InputError, match="no file or directory '.*missing.parquet'"):
        events.read_events(tmp_path / "missing.parquet")
    with pytest.raises(InputError, match="contains no .parquet or .arrow/.feather file"):
        events.read_events(tmp_path)


def test_corrupt_parquet(tmp_path):
    bad = tmp_path / "bad.parquet"
    bad.write_bytes(b"PAR1 this is not really parquet")
    with pytest.raises(InputError, match=r"cannot read '.*bad.parquet' as Parquet .*corrupt"):
        events.read_events(bad)


def test_collection_absent_lists_present(tmp_path):
    counts, obj = _truth_objects()
    path = _write(tmp_path / "e.parquet", counts, obj, "records")
    with pytest.raises(InputError, match=r"collection 'muons' is not in '.*e.parquet' \(did you "
                                         r"mean 'muon'\?\); collections present: muon"):
        events.read_events(path, "muons")


@pytest.mark.parametrize("layout", ["records", "columns"])
def test_kinematic_field_missing(tmp_path, layout):
    counts, obj = _truth_objects()
    del obj["phi"]
    path = _write(tmp_path / "e.parquet", counts, obj, layout)
    with pytest.raises(InputError, match=r"collection 'muon' in '.*' .* has no kinematic field "
                                         r"'phi'; fields present: charge, eta, isolation, mass, pt"):
        events.read_events(path, "muon")


def test_non_numeric_kinematics(tmp_path):
    counts, obj = _truth_objects()
    obj["eta"] = obj["eta"].astype(str)
    path = _write(tmp_path / "e.parquet", counts, obj, "columns")
    with pytest.raises(InputError, match=r"kinematic field 'eta' of collection 'muon' in "
                                         r"'.*' \(column 'muon.eta'\) has type string"):
        events.read_events(path)


def test_schemas_disagree_names_both_files(tmp_path):
    counts, obj = _truth_objects()
    _write(tmp_path / "a.parquet", counts, obj, "records")
    del obj["isolation"]
    _write(tmp_path / "b.parquet", counts, obj, "records")
    with pytest.raises(InputError, match=r"files '.*a.parquet' and '.*b.parquet' disagree: "
                                         r"field 'muon.isolation' is only in the first"):
        events.read_events(tmp_path)
    # reading only what both have works
    ev = events.read_events(tmp_path, "muon", fields=["charge"])
    assert len(ev) == 2 * N_EVENTS


def test_sibling_columns_with_different_counts(tmp_path):
    counts, obj = _truth_objects()
    off = np.concatenate([[0], np.cumsum(counts)]).astype(np.int32)
    cols = {f"muon_{k}": pa.ListArray.from_arrays(pa.array(off), pa.array(v))
            for k, v in obj.items()}
    off2 = off.copy()
    off2[5:] += 1
    cols["muon_phi"] = pa.ListArray.from_arrays(pa.array(off2),
                                                pa.array(np.zeros(off2[-1])))
    pq.write_table(pa.table(cols), tmp_path / "s.parquet")
    with pytest.raises(InputError, match=r"columns 'muon_pt' and 'muon_phi' of '.*' have "
                                         r"different numbers of entries in event 4"):
        events.read_events(tmp_path / "s.parquet", column_pattern="{collection}_{field}")


@pytest.mark.parametrize("pattern", ["{collection}_{field}", "{field}_of_{collection}",
                                     "{collection}:{field}"])
def test_column_pattern_names_sibling_columns(tmp_path, pattern):
    # the same objects as list-of-struct records (the reference layout) and as sibling columns
    # named by a pattern the user gives; without the pattern such columns are no collection
    counts, obj = _truth_objects()
    ref = events.read_events(_write(tmp_path / "r.parquet", counts, obj, "records"), "muon")
    off = pa.array(np.concatenate([[0], np.cumsum(counts)]).astype(np.int32))
    cols = {pattern.format(collection="muon", field=k): pa.ListArray.from_arrays(off, pa.array(v))
            for k, v in obj.items()}
    pq.write_table(pa.table(cols), tmp_path / "c.parquet")
    got = events.read_events(tmp_path / "c.parquet", "muon", column_pattern=pattern)
    assert ak.array_equal(got.muon, ref.muon)
    with pytest.raises(InputError, match="collection 'muon' is not in"):
        events.read_events(tmp_path / "c.parquet", "muon")
    with pytest.raises(InputError, match="must hold {collection} and {field} once each"):
        events.read_events(tmp_path / "c.parquet", "muon", column_pattern="{collection}")


def test_unknown_field(tmp_path):
    counts, obj = _truth_objects()
    path = _write(tmp_path / "e.parquet", counts, obj, "records")
    with pytest.raises(InputError, match=r"field 'isolaton' is not in .* \(did you mean "
                                         r"'isolation'\?\)"):
        events.read_events(path, fields=["isolaton"])


@pytest.mark.parametrize("coords", ["polar", "cartesian"])
def test_bad_values_dropped_with_one_warning_or_raised(tmp_path, coords):
    counts, obj = _truth_objects()
    stored = obj if coords == "polar" else _cartesian(obj)
    first = "pt" if coords == "polar" else "px"
    neg = "pt" if coords == "polar" else "energy"
    stored = {k: np.array(v, copy=True) for k, v in stored.items()}
    stored[first][[3, 10]] = np.nan
    stored["eta" if coords == "polar" else "pz"][20] = np.inf
    stored[neg][[30, 31, 32]] *= -1
    path = _write(tmp_path / "e.parquet", counts, stored, "records", row_group_size=100)
    with warnings.catch_warnings(record=True) as rec:
        warnings.simplefilter("always")
        ev = events.read_events(path)
    msgs = [str(w.message) for w in rec if issubclass(w.category, DataWarning)]
    assert len(msgs) == 1, msgs
    what = "negative pt" if coords == "polar" else "negative energy"
    assert "3 with NaN or infinite kinematics" in msgs[0]
    assert f"3 with {what}" in msgs[0] and f"(of {counts.sum()})" in msgs[0]
    assert "strict=True" in msgs[0]
    assert int(ak.sum(ak.num(ev.muon))) == counts.sum() - 6
    assert np.all(np.isfinite(ak.flatten(ev.muon.pt))) and np.all(ak.flatten(ev.muon.pt) >= 0)
    # strict: the error names the event holding the first bad object (object index 3)
    ev_of_3 = int(np.searchsorted(np.cumsum(counts), 3, side="right"))
    with pytest.raises(InputError, match=rf"collection 'muon': 3 objects have NaN or infinite "
                                         rf"kinematics \(first in event {ev_of_3}\).*strict=False"):
        events.read_events(path, strict=True)


def test_dropping_keeps_event_alignment(tmp_path):
    counts = np.array([2, 0, 3, 1])
    obj = {"pt": np.array([10.0, 20.0, np.nan, 30.0, 40.0, 50.0]),
           "eta": np.zeros(6), "phi": np.zeros(6)}
    path = _write(tmp_path / "e.parquet", counts, obj, "columns")
    with pytest.warns(DataWarning, match="1 with NaN or infinite kinematics"):
        ev = events.read_events(path)
    assert ak.to_list(ev.muon.pt) == [[10.0, 20.0], [], [30.0, 40.0], [50.0]]


def test_files_with_different_float_widths_combine(tmp_path):
    counts, obj = _truth_objects()
    _write(tmp_path / "a.parquet", counts, obj, "records")
    narrow = {k: (v.astype(np.float32) if v.dtype == np.float64 else v) for k, v in obj.items()}
    _write(tmp_path / "b.parquet", counts, narrow, "columns")
    ev = events.read_events(tmp_path)
    assert len(ev) == 2 * N_EVENTS
    pt = ak.to_numpy(ak.flatten(ev.muon.pt))
    assert pt.dtype == np.float64
    np.testing.assert_array_equal(pt[: counts.sum()], obj["pt"])
    np.testing.assert_allclose(pt[counts.sum():], obj["pt"], rtol=1e-7)
    whole = ak.concatenate(list(events.iter_events(tmp_path, chunk_events=100)))
    assert ak.array_equal(whole, ev)


def test_check_files_up_front(tmp_path):
    counts, obj = _truth_objects()
    _write(tmp_path / "a.parquet", counts, obj, "records")
    assert [f.name for f in events.check_files(tmp_path, "muon")] == ["a.parquet"]
    obj["charge"] = obj["charge"].astype(np.float32)
    _write(tmp_path / "b.parquet", counts, obj, "records")
    with pytest.raises(InputError, match=r"'.*a.parquet' and '.*b.parquet' disagree: field "
                                         r"'muon.charge' is int in the first and float"):
        events.check_files(tmp_path, "muon")
