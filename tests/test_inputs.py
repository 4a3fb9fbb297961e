"""Events from wherever users hold them: awkward arrays (ak.from_parquet / ak.from_feather,
vector records in other coordinate systems, option types), pyarrow tables and record-batch
readers, Arrow IPC (Feather) files and fsspec URLs.  Reference: the Parquet reader's
candidates for the same events, and for converted coordinates the invariant mass written out
in the test, m^2 = (E1 + E2)^2 - |p1 + p2|^2 (PDG Review, "Kinematics")."""

from __future__ import annotations

import warnings

import awkward as ak
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from pyarrow import feather

import peaksift
from peaksift.errors import DataWarning, InputError
from peaksift.events import list_files, plan_chunks, read_chunk, read_events

N_EVENTS = 12_000


@pytest.fixture(scope="module")
def parquet_file(demo_dir, tmp_path_factory):
    t = pq.read_table(min(demo_dir.glob("events_*.parquet"))).slice(0, N_EVENTS)
    p = tmp_path_factory.mktemp("inputs") / "events.parquet"
    pq.write_table(t, p, row_group_size=5000)
    return p


@pytest.fixture(scope="module")
def reference(parquet_file):
    return peaksift.pair(read_events(parquet_file), "muon", charge="opposite")


def _same(c, ref):
    assert len(c) == len(ref) > 100
    np.testing.assert_array_equal(c.event_index, ref.event_index)
    np.testing.assert_array_equal(c.mass, ref.mass)  # the same float32 inputs: exact


def test_awkward_from_parquet_and_feather(parquet_file, reference, tmp_path):
    f = tmp_path / "events.feather"
    feather.write_feather(pq.read_table(parquet_file), f, chunksize=4000)
    for arr in (ak.from_parquet(parquet_file), ak.from_feather(f)):
        assert "?" in str(arr.type)  # option types, as those readers give them
        with warnings.catch_warnings():
            warnings.simplefilter("error", DataWarning)  # nothing is missing: no warning
            _same(peaksift.pair(arr, "muon", charge="opposite"), reference)
    _same(peaksift.pair(read_events(f), "muon", charge="opposite"), reference)  # Feather file


def test_arrow_table_batch_and_reader(parquet_file, reference):
    t = pq.read_table(parquet_file)
    _same(peaksift.pair(t, "muon", charge="opposite"), reference)
    reader = pa.RecordBatchReader.from_batches(t.schema, t.to_batches(max_chunksize=3000))
    _same(peaksift.pair(read_events(reader), "muon", charge="opposite"), reference)


def test_memory_url_file_directory_and_glob(parquet_file, reference, tmp_path):
    fsspec = pytest.importorskip("fsspec")
    f = tmp_path / "events.arrow"
    feather.write_feather(pq.read_table(parquet_file), f, chunksize=5000)
    with fsspec.open("memory://eco-test/a/events.parquet", "wb") as out:
        out.write(parquet_file.read_bytes())
    with fsspec.open("memory://eco-test/a/sub/events.arrow", "wb") as out:
        out.write(f.read_bytes())
    _same(peaksift.pair(read_events("memory://eco-test/a/events.parquet"), "muon",
                        charge="opposite"), reference)
    files = list_files("memory://eco-test/a")
    assert files == ["memory:///eco-test/a/events.parquet", "memory:///eco-test/a/sub/events.arrow"]
    assert list_files("memory://eco-test/a/*.parquet") == files[:1]
    specs = plan_chunks("memory://eco-test/a", chunk_events=5000)
    assert [s.n_events for s in specs] == [5000, 5000, 2000] * 2
    # the Arrow IPC copy chunk by chunk: record batches play the row groups
    parts = [peaksift.pair(read_chunk(s, "muon"), "muon", charge="opposite",
                           event_offset=s.first_event - N_EVENTS) for s in specs[3:]]
    _same(peaksift.Candidates.concatenate(parts), reference)
    with pytest.raises(InputError, match="no file matches"):
        list_files("memory://eco-test/none/*.parquet")


def test_vector_records_in_other_coordinate_systems(parquet_file, reference):
    vector = pytest.importorskip("vector")
    mu = read_events(parquet_file).muon
    mu = ak.zip({k: ak.values_astype(mu[k], np.float64) for k in ("pt", "eta", "phi", "mass",
                                                                  "charge")},
                with_name="Momentum4D")
    forms = {
        "px, py, pz, E": vector.zip({"px": mu.px, "py": mu.py, "pz": mu.pz, "E": mu.E,
                                     "charge": mu.charge}),
        "x, y, z, t": vector.zip({"x": mu.px, "y": mu.py, "z": mu.pz, "t": mu.E,
                                  "charge": mu.charge}),
        "pt, eta, phi, M": vector.zip({"pt": mu.pt, "eta": mu.eta, "phi": mu.phi, "M": mu.mass,
                                       "charge": mu.charge}),
        "pt, eta, phi, E": vector.zip({"pt": mu.pt, "eta": mu.eta, "phi": mu.phi, "E": mu.E,
                                       "charge": mu.charge}),
    }
    for name, coll in forms.items():
        c = peaksift.pair(ak.zip({"muon": coll}, depth_limit=1), "muon", charge="opposite")
        np.testing.assert_array_equal(c.event_index, reference.event_index, err_msg=name)
        # float64 conversions of the same objects: 1e-9 relative (muon masses are small
        # against the momenta, so the Cartesian forms lose a few digits to cancellation)
        np.testing.assert_allclose(c.mass, reference.mass, rtol=1e-9, err_msg=name)


def test_missing_values_are_stripped_with_a_warning(parquet_file, reference):
    arr = ak.from_parquet(parquet_file)
    mu = arr.muon
    # event 0 loses its muon list (None); it counts as an event without muons
    mask_ev = np.arange(len(arr)) == 0
    mu_opt = ak.mask(mu, ~mask_ev)
    arr2 = ak.with_field(arr, mu_opt, "muon")
    with pytest.warns(DataWarning, match="1 events without the collection"):
        c = peaksift.pair(arr2, "muon", charge="opposite")
    keep = reference.event_index != 0
    np.testing.assert_array_equal(c.mass, reference.mass[keep])


@pytest.mark.parametrize("bad", [np.zeros(3), [1.0, 2.0], {"muon": 1}, "not-an-array-of-events",
                                 ak.Array([1.0, 2.0])])
def test_other_inputs_are_input_errors(bad):
    with pytest.raises(InputError):
        peaksift.pair(bad, "muon")


@pytest.mark.parametrize("suffix", [".parquet", ".arrow", ".feather"])
def test_candidates_to_files_and_back(reference, tmp_path, suffix):
    p = reference.save(tmp_path / f"cands{suffix}")
    back = peaksift.Candidates.load(p)
    assert back == reference and back.cutflow == reference.cutflow
    # another reader sees plain columns: pyarrow's own readers, no peaksift involved
    t = pq.read_table(p) if suffix == ".parquet" else feather.read_table(p)
    np.testing.assert_array_equal(t.column("mass").to_numpy(), reference.mass)
    np.testing.assert_array_equal(t.column("event_index").to_numpy(), reference.event_index)
    assert peaksift.Candidates.from_arrow(reference.to_arrow()) == reference
    with pytest.raises(InputError, match="give a .parquet, .arrow or .feather"):
        reference.save(tmp_path / "cands.csv")
