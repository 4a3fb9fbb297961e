"""Pair building: masses against an exact reference, candidate choice, cut flow, errors.

References used here:
* invariant mass m^2 = (sum E)^2 - |sum p|^2 of the summed four-vector (PDG Review,
  "Kinematics"), evaluated in the tests in exact rational arithmetic (``fractions``) from
  Cartesian components the tests compute themselves, then rounded once;
* two massless objects back to back with energy E each have m = 2E (common practice);
* Delta R = sqrt(d_eta^2 + d_phi^2) with d_phi wrapped into [-pi, pi] (common practice);
* the choose rules and tie rule as documented in ``peaksift.pairing`` (brute force in
  plain Python over every pair).
"""

from __future__ import annotations

import decimal
import itertools
import math
import pickle
from fractions import Fraction

import awkward as ak
import numpy as np
import pytest
import vector

from peaksift import pair
from peaksift.errors import ConfigError, CutError, InputError
from peaksift.pairing import Candidates

vector.register_awkward()

MUON_MASS = 0.1056583755  # GeV, from memory (PDG); only used as a realistic object mass


# ----------------------------------------------------------------- helpers
def _collection(rows: list[list[dict]], fields=("pt", "eta", "phi", "mass", "charge")):
    counts = [len(r) for r in rows]
    cols = {}
    for f in fields:
        flat = [o[f] for r in rows for o in r]
        dt = np.int32 if f == "charge" else np.float64
        cols[f] = ak.unflatten(np.asarray(flat, dtype=dt), counts)
    return ak.zip(cols, with_name="Momentum4D")


def _events(weight=None, **colls) -> ak.Array:
    d = dict(colls)
    if weight is not None:
        d["weight"] = np.asarray(weight, dtype=float)
    return ak.zip(d, depth_limit=1)


def _mu(pt, eta=0.0, phi=0.0, mass=MUON_MASS, charge=1):
    return {"pt": pt, "eta": eta, "phi": phi, "mass": mass, "charge": charge}


def _random_rows(rng, n_events, max_objects=8, charged=True):
    rows = []
    for _ in range(n_events):
        n = int(rng.integers(0, max_objects + 1))
        rows.append([
            {"pt": float(5 + rng.exponential(25)), "eta": float(rng.uniform(-2.5, 2.5)),
             "phi": float(rng.uniform(-math.pi, math.pi)),
             "mass": float(rng.choice([MUON_MASS, 0.000511, 1.2, 4.0])),
             "charge": int(rng.choice([-1, 1])) if charged else 0}
            for _ in range(n)
        ])
    return rows


def _cart(o):
    """Cartesian components written out here, independently of peaksift.kinematics."""
    pt, eta, phi, m = o["pt"], o["eta"], o["phi"], o["mass"]
    return (pt * math.cos(phi), pt * math.sin(phi), pt * math.sinh(eta),
            math.sqrt((pt * math.cosh(eta)) ** 2 + m * m))


def _exact_mass(v1, v2) -> float:
    """Mass of v1 + v2 in exact rational arithmetic, rounded once (PDG "Kinematics")."""
    px, py, pz, e = (Fraction(a) + Fraction(b) for a, b in zip(v1, v2))
    m2 = e * e - px * px - py * py - pz * pz
    if m2 <= 0:
        return 0.0
    with decimal.localcontext() as ctx:
        ctx.prec = 40
        return float((decimal.Decimal(m2.numerator) / decimal.Decimal(m2.denominator)).sqrt())


def _delta_r(o1, o2) -> float:
    dphi = (o1["phi"] - o2["phi"] + math.pi) % (2 * math.pi) - math.pi
    return math.hypot(o1["eta"] - o2["eta"], dphi)


def _ref_pairs(rows_a, rows_b=None, *, charge=None, min_dr=None, cart=_cart):
    """Every pair passing the requirements, in documented order: (event, i, j, o_i, o_j)."""
    out = []
    for ev, ra in enumerate(rows_a):
        if rows_b is None:
            it = itertools.combinations(range(len(ra)), 2)
            rb = ra
        else:
            rb = rows_b[ev]
            it = itertools.product(range(len(ra)), range(len(rb)))
        for i, j in it:
            q = ra[i]["charge"] * rb[j]["charge"]
            if charge == "opposite" and not q < 0:
                continue
            if charge == "same" and not q > 0:
                continue
            if min_dr is not None and _delta_r(ra[i], rb[j]) < min_dr:
                continue
            out.append((ev, i, j, ra[i], rb[j]))
    return out


def _ref_choose(pairs, choose, target=None):
    """The documented rule: maximise the key, first pair in order wins exact ties."""
    best = {}
    for p in pairs:
        ev, _, _, a, b = p
        if choose == "leading":
            key = (max(a["pt"], b["pt"]), min(a["pt"], b["pt"]))
        elif choose == "max_sum_pt":
            key = (a["pt"] + b["pt"],)
        elif choose == "closest":
            key = (-abs(_exact_mass(_cart(a), _cart(b)) - target),)
        else:
            raise AssertionError(choose)
        if ev not in best or key > best[ev][0]:
            best[ev] = (key, p)
    return [best[ev][1] for ev in sorted(best)]


def _assert_masses(cands, ref_pairs, cart=_cart, rtol=1e-12):
    assert len(cands) == len(ref_pairs)
    got = list(zip(cands.event_index.tolist(), cands.first_index.tolist(),
                   cands.second_index.tolist()))
    assert got == [(ev, i, j) for ev, i, j, _, _ in ref_pairs]
    ref = np.array([_exact_mass(cart(a), cart(b)) for _, _, _, a, b in ref_pairs])
    np.testing.assert_allclose(cands.mass, ref, rtol=rtol, atol=0)


# ------------------------------------------------------- masses vs reference
@pytest.fixture(scope="module")
def random_rows():
    rng = np.random.default_rng(20261201)
    return _random_rows(rng, 300), _random_rows(rng, 300, max_objects=5)


@pytest.mark.parametrize("charge", [None, "opposite", "same"])
def test_same_collection_masses_match_exact_reference(random_rows, charge):
    rows, _ = random_rows
    ev = _events(muon=_collection(rows))
    c = pair(ev, "muon", charge=charge)
    ref = _ref_pairs(rows, charge=charge)
    assert len(ref) > 300
    _assert_masses(c, ref)
    # pT and rapidity of the summed four-vector (PDG "Kinematics"), from the test's components
    sums = [np.add(_cart(a), _cart(b)) for *_, a, b in ref]
    np.testing.assert_allclose(c.pt, [math.hypot(s[0], s[1]) for s in sums], rtol=1e-12)
    np.testing.assert_allclose(
        c.rapidity, [0.5 * math.log((s[3] + s[2]) / (s[3] - s[2])) for s in sums],
        rtol=1e-9, atol=1e-12)
    assert np.all(c.weight == 1.0)


@pytest.mark.parametrize("min_dr", [None, 0.4, 1.5])
def test_cross_collection_masses_with_delta_r(random_rows, min_dr):
    rows_a, rows_b = random_rows
    ev = _events(muon=_collection(rows_a), electron=_collection(rows_b))
    c = pair(ev, "muon", "electron", charge="opposite", min_delta_r=min_dr)
    ref = _ref_pairs(rows_a, rows_b, charge="opposite", min_dr=min_dr)
    assert len(ref) > 100
    _assert_masses(c, ref)


def test_same_collection_delta_r(random_rows):
    rows, _ = random_rows
    ev = _events(muon=_collection(rows))
    c = pair(ev, "muon", min_delta_r=1.0)
    _assert_masses(c, _ref_pairs(rows, min_dr=1.0))


def test_cartesian_input_through_the_reader(tmp_path):
    """Objects stored as (px, py, pz, energy) and read by peaksift.read_events."""
    pq = pytest.importorskip("pyarrow.parquet")
    import pyarrow as pa

    from peaksift.events import read_events

    rng = np.random.default_rng(7)
    rows, carts = [], []
    for _ in range(250):
        n = int(rng.integers(0, 9))
        r, cr = [], []
        for _ in range(n):
            px, py = rng.normal(0, 30, 2)
            pz = rng.normal(0, 60)
            m = float(rng.choice([MUON_MASS, 3.0]))
            e = math.sqrt(px * px + py * py + pz * pz + m * m)
            r.append({"px": float(px), "py": float(py), "pz": float(pz), "energy": e,
                      "charge": int(rng.choice([-1, 1]))})
            cr.append((float(px), float(py), float(pz), e))
        rows.append(r)
        carts.append(cr)
    table = pa.table({"muon": pa.array(rows)})
    path = tmp_path / "cart.parquet"
    pq.write_table(table, path)
    ev = read_events(path)
    c = pair(ev, "muon", charge="opposite")
    # reference from the stored Cartesian components, exact arithmetic
    ref = []
    for e_i, (r, cr) in enumerate(zip(rows, carts)):
        for i, j in itertools.combinations(range(len(r)), 2):
            if r[i]["charge"] * r[j]["charge"] < 0:
                ref.append((e_i, i, j, _exact_mass(cr[i], cr[j])))
    assert len(ref) > 300
    assert list(zip(c.event_index.tolist(), c.first_index.tolist(), c.second_index.tolist())) \
        == [t[:3] for t in ref]
    np.testing.assert_allclose(c.mass, [t[3] for t in ref], rtol=1e-12, atol=0)


def test_back_to_back_massless_pair_is_twice_the_energy():
    """m = 2E for two massless objects back to back (common practice)."""
    ev = _events(photon=_collection([[_mu(45.0, 0.0, 0.0, 0.0, 0), _mu(45.0, 0.0, math.pi, 0.0, 0)]]))
    c = pair(ev, "photon")
    assert c.mass[0] == pytest.approx(90.0, rel=1e-14)
    assert c.pt[0] == pytest.approx(0.0, abs=1e-12)


# --------------------------------------------------------------- choose rules
def _hand_events():
    """Small events with known answers (pt in GeV; eta/phi chosen so masses differ)."""
    rows = [
        # 0: same-sign pairs (A,B) has the hardest object, (C,D) the largest sum
        [_mu(50, 0.1, 0.0, charge=1), _mu(5, -0.3, 1.0, charge=1),
         _mu(45, 0.5, 2.0, charge=-1), _mu(44, -0.7, -2.5, charge=-1)],
        # 1: exact tie: objects 1 and 2 are identical, so (0,1) and (0,2) tie on every key
        [_mu(40, 0.2, 0.0, charge=1), _mu(30, -0.4, 2.5, charge=-1),
         _mu(30, -0.4, 2.5, charge=-1)],
        # 2: leading decided by the softer object (same harder object)
        [_mu(60, 0.0, 0.0, charge=1), _mu(20, 1.0, 2.0, charge=-1),
         _mu(35, -1.0, -2.0, charge=-1)],
        # 3: a single object: no pair
        [_mu(70, 0.0, 0.0)],
        # 4: no objects
        [],
    ]
    return rows


def test_leading_and_max_sum_pt_on_hand_built_events():
    rows = _hand_events()
    ev = _events(muon=_collection(rows))
    lead = pair(ev, "muon", charge="same", choose="leading")
    msum = pair(ev, "muon", charge="same", choose="max_sum_pt")
    # event 0: same-sign pairs are (0,1) [50, 5] and (2,3) [45, 44]
    assert (lead.event_index[0], lead.first_index[0], lead.second_index[0]) == (0, 0, 1)
    assert (msum.event_index[0], msum.first_index[0], msum.second_index[0]) == (0, 2, 3)
    # event 1: same-sign pair only (1,2)
    assert (lead.event_index[1], lead.first_index[1], lead.second_index[1]) == (1, 1, 2)

    lead = pair(ev, "muon", charge="opposite", choose="leading")
    msum = pair(ev, "muon", charge="opposite", choose="max_sum_pt")
    picks = {int(e): (int(i), int(j)) for e, i, j in
             zip(lead.event_index, lead.first_index, lead.second_index)}
    # event 0: opposite pairs (0,2) [50,45], (0,3) [50,44], (1,2), (1,3) -> (0,2)
    # event 1: (0,1) and (0,2) tie exactly -> lowest indices (0,1)
    # event 2: harder object 60 in both (0,1) and (0,2); softer 35 > 20 -> (0,2)
    assert picks == {0: (0, 2), 1: (0, 1), 2: (0, 2)}
    picks = {int(e): (int(i), int(j)) for e, i, j in
             zip(msum.event_index, msum.first_index, msum.second_index)}
    assert picks == {0: (0, 2), 1: (0, 1), 2: (0, 2)}
    assert lead.multiplicity is None


def test_closest_with_known_masses_and_tie():
    # massless back-to-back pairs: m = 2 sqrt(pt1 pt2) at eta = 0 (common practice, m = 2E)
    rows = [[_mu(45, 0.0, 0.0, 0.0, 1), _mu(45, 0.0, math.pi, 0.0, -1),
             _mu(40, 0.0, math.pi, 0.0, -1)],
            # identical objects 1 and 2: the two pairs have bit-identical masses -> (0,1)
            [_mu(30, 0.3, 0.0, 0.0, 1), _mu(25, -0.2, 2.9, 0.0, -1),
             _mu(25, -0.2, 2.9, 0.0, -1)]]
    ev = _events(muon=_collection(rows))
    c = pair(ev, "muon", charge="opposite", choose="closest", target_mass=88.0)
    # event 0: (0,1) m = 90, (0,2) m = 2 sqrt(45*40) = 84.85; |90-88| < |84.85-88|
    assert (c.first_index[0], c.second_index[0]) == (0, 1)
    assert c.mass[0] == pytest.approx(90.0, rel=1e-12)
    assert (c.first_index[1], c.second_index[1]) == (0, 1)
    c = pair(ev, "muon", charge="opposite", choose="closest", target_mass=80.0)
    assert (c.first_index[0], c.second_index[0]) == (0, 2)
    assert c.mass[0] == pytest.approx(2 * math.sqrt(45 * 40), rel=1e-12)


@pytest.mark.parametrize("choose", ["leading", "max_sum_pt", "closest"])
@pytest.mark.parametrize("charge,min_dr", [(None, None), ("opposite", None), ("same", 0.8),
                                           ("opposite", 1.2)])
def test_choose_rules_match_brute_force(random_rows, choose, charge, min_dr):
    rows, _ = random_rows
    ev = _events(muon=_collection(rows))
    target = 91.0 if choose == "closest" else None
    c = pair(ev, "muon", charge=charge, choose=choose, target_mass=target, min_delta_r=min_dr)
    ref = _ref_choose(_ref_pairs(rows, charge=charge, min_dr=min_dr), choose, target)
    assert len(ref) > 100
    _assert_masses(c, ref)
    assert c.cutflow["events_with_pair"] == len(ref) == c.cutflow["candidates"]


def test_all_multiplicity_and_order():
    rows = _hand_events()
    ev = _events(muon=_collection(rows))
    c = pair(ev, "muon")
    # C(4,2) + C(3,2) + C(3,2) pairs, in event then (i, j) order
    assert c.event_index.tolist() == [0] * 6 + [1] * 3 + [2] * 3
    assert c.first_index.tolist() == [0, 0, 0, 1, 1, 2, 0, 0, 1, 0, 0, 1]
    assert c.second_index.tolist() == [1, 2, 3, 2, 3, 3, 1, 2, 2, 1, 2, 2]
    assert c.multiplicity.tolist() == [6] * 6 + [3] * 6


# -------------------------------------------------------- cuts and cut flow
def test_cutflow_counters_and_weights():
    rows = _hand_events()
    w = [0.5, 2.0, 1.5, 1.0, 3.0]
    ev = _events(weight=w, muon=_collection(rows))
    c = pair(ev, "muon", cut="pt > 10", event_cut="n_muon >= 3", charge="opposite")
    # event cut keeps events 0, 1, 2; pt > 10 drops object 1 of event 0
    # opposite pairs: ev0 (0,2), (0,3); ev1 (0,1), (0,2); ev2 (0,1), (0,2)
    assert c.cutflow == {"events_in": 5, "events_after_event_cut": 3,
                         "events_with_pair": 3, "candidates": 6}
    assert c.first_index.tolist() == [0, 0, 0, 0, 0, 0]
    assert c.second_index.tolist() == [2, 3, 1, 2, 1, 2]
    assert c.weight.tolist() == [0.5, 0.5, 2.0, 2.0, 1.5, 1.5]
    # same selection as a callable and as awkward masks
    c2 = pair(ev, "muon", cut=lambda mu: mu.pt > 10,
              event_cut=lambda e: ak.num(e.muon) >= 3, charge="opposite")
    c3 = pair(ev, "muon", cut=ev.muon.pt > 10, event_cut=ak.num(ev.muon) >= 3,
              charge="opposite")
    for other in (c2, c3):
        np.testing.assert_array_equal(other.mass, c.mass)
        assert other.cutflow == c.cutflow


def test_cross_collection_cuts_apply_to_their_own_collection():
    mu = _collection([[_mu(30, 0.0, 0.0, charge=1), _mu(8, 1.0, 1.0, charge=-1)]])
    el = _collection([[_mu(9, -1.0, 2.0, 0.000511, -1), _mu(40, 0.5, -2.0, 0.000511, 1)]])
    ev = _events(muon=mu, electron=el)
    c = pair(ev, "muon", "electron", cut="pt > 10")
    assert list(zip(c.first_index.tolist(), c.second_index.tolist())) == [(0, 0), (0, 1)]
    c = pair(ev, "muon", "electron", cut="pt > 10", second_cut="pt > 10")
    assert list(zip(c.first_index.tolist(), c.second_index.tolist())) == [(0, 1)]
    c = pair(ev, "muon", "electron", charge="opposite")
    assert list(zip(c.first_index.tolist(), c.second_index.tolist())) == [(0, 0), (1, 1)]


def test_chunks_with_offsets_concatenate_to_one_pass(random_rows):
    rows, _ = random_rows
    ev = _events(weight=np.linspace(0.5, 2.0, len(rows)), muon=_collection(rows))
    whole = pair(ev, "muon", charge="opposite", cut="pt > 8")
    parts = [pair(ev[a:b], "muon", charge="opposite", cut="pt > 8", event_offset=a)
             for a, b in [(0, 97), (97, 200), (200, 300)]]
    joined = Candidates.concatenate(parts)
    for col in Candidates._COLUMNS + ("multiplicity",):
        np.testing.assert_array_equal(getattr(joined, col), getattr(whole, col), err_msg=col)
    assert joined.cutflow == whole.cutflow
    back = pickle.loads(pickle.dumps(joined))
    np.testing.assert_array_equal(back.mass, whole.mass)


def test_in_window_closes_both_ends_as_the_histogram():
    """The window keeps lo <= m <= hi: the masses numpy.histogram puts in bins on [lo, hi]
    (its last bin is closed), as MassHistogram does."""
    ev = _events(photon=_collection([[_mu(45.0, 0.0, 0.0, 0.0, 0),
                                      _mu(45.0, 0.0, math.pi, 0.0, 0),
                                      _mu(20.0, 0.0, math.pi / 2, 0.0, 0)]]))
    c = pair(ev, "photon")
    lo, hi = c.mass.min(), c.mass.max()
    w = c.in_window(lo, hi)
    assert len(w) == len(c) == np.histogram(c.mass, bins=[lo, hi])[0].sum()
    below = np.nextafter(hi, -np.inf)
    w2 = c.in_window(lo, below)
    assert len(w2) == len(c) - 1 == np.histogram(c.mass, bins=[lo, below])[0].sum()
    assert w.cutflow == c.cutflow
    with pytest.raises(InputError, match="lo < hi"):
        c.in_window(5, 1)


# -------------------------------------------------------------------- errors
def test_errors_are_clear():
    rows = _hand_events()
    ev = _events(muon=_collection(rows), photon=_collection(rows, ("pt", "eta", "phi", "mass")))
    with pytest.raises(InputError, match=r"no collection 'muons'.*did you mean 'muon'"):
        pair(ev, "muons")
    with pytest.raises(InputError, match=r"needs a 'charge' field in collection 'photon'.*"
                                         r"charge=None"):
        pair(ev, "photon", charge="opposite")
    with pytest.raises(ConfigError, match=r"choose='leadng'.*did you mean 'leading'"):
        pair(ev, "muon", choose="leadng")
    with pytest.raises(ConfigError, match=r"charge='oposite'.*did you mean 'opposite'"):
        pair(ev, "muon", charge="oposite")
    with pytest.raises(ConfigError, match="needs target_mass"):
        pair(ev, "muon", choose="closest")
    with pytest.raises(ConfigError, match="only used with choose='closest'"):
        pair(ev, "muon", target_mass=91.0)
    with pytest.raises(ConfigError, match="min_delta_r must be a finite number >= 0"):
        pair(ev, "muon", min_delta_r=-1)
    with pytest.raises(ConfigError, match="second_cut applies only"):
        pair(ev, "muon", second_cut="pt > 3")
    with pytest.raises(CutError, match=r"unknown name 'isolation'.*collection 'muon' has: "
                                       r"charge, eta, mass, phi, pt"):
        pair(ev, "muon", cut="isolation < 0.1")
    with pytest.raises(CutError, match=r"unknown name 'n_muons'.*did you mean 'n_muon'"):
        pair(ev, "muon", event_cut="n_muons >= 2")
    with pytest.raises(CutError, match="does not match the collection"):
        pair(ev, "muon", cut=ev.muon.pt[::-1] > 10)


def test_sliced_and_masked_events_give_the_same_as_packed(random_rows):
    """Views of events (slices, masks: indexed layouts) read the same objects as a copy."""
    rows, _ = random_rows
    ev = _events(weight=np.arange(len(rows), dtype=float), muon=_collection(rows))
    mask = np.random.default_rng(5).uniform(size=len(rows)) < 0.5
    for sub in (ev[10:250], ev[::3], ev[mask]):
        packed = ak.to_packed(sub)
        for choose, target in (("all", None), ("leading", None), ("closest", 90.0)):
            kw = {"charge": "opposite", "choose": choose, "cut": "pt > 10",
                  "target_mass": target}
            a, b = pair(sub, "muon", **kw), pair(packed, "muon", **kw)
            for col in Candidates._COLUMNS:
                np.testing.assert_array_equal(getattr(a, col), getattr(b, col), err_msg=col)
            assert a.cutflow == b.cutflow


def test_no_events_and_no_pairs():
    ev = _events(muon=_collection(_hand_events()))
    for choose in ("all", "leading", "max_sum_pt"):
        c = pair(ev[:0], "muon", charge="opposite", choose=choose)
        assert len(c) == 0 and c.cutflow["events_in"] == 0
    c = pair(ev, "muon", cut="pt > 1000")
    assert len(c) == 0 and c.cutflow == {"events_in": 5, "events_after_event_cut": 5,
                                         "events_with_pair": 0, "candidates": 0}
    assert len(Candidates.concatenate([])) == 0


@pytest.mark.parametrize("second", [None, "electron"])
def test_all_fast_path_agrees_with_the_listing_path(random_rows, second):
    """choose='all' computes pairs with the polar formulas in one kernel; the general path
    (taken when min_delta_r is set; a tiny value removes no pair here) lists the pairs and
    adds Cartesian four-vectors.  Same pairs, indices, weights, multiplicities and cut flow;
    masses, pT and rapidities equal to rounding (both are checked against exact references
    above)."""
    rows_a, rows_b = random_rows
    ev = _events(weight=np.linspace(1, 2, len(rows_a)), muon=_collection(rows_a),
                 electron=_collection(rows_b))
    kw = {"charge": "opposite", "cut": "pt > 7"}
    if second:
        kw["second_cut"] = "pt > 9"
    fast = pair(ev, "muon", second, **kw)
    listed = pair(ev, "muon", second, min_delta_r=1e-300, **kw)
    assert len(fast) > 100
    for col in ("weight", "event_index", "first_index", "second_index", "multiplicity"):
        np.testing.assert_array_equal(getattr(fast, col), getattr(listed, col), err_msg=col)
    assert fast.cutflow == listed.cutflow
    np.testing.assert_allclose(fast.mass, listed.mass, rtol=1e-12, atol=0)
    np.testing.assert_allclose(fast.pt, listed.pt, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(fast.rapidity, listed.rapidity, rtol=1e-12, atol=1e-12)


_EXTENSIONS_LATER = """
import sys
import awkward as ak
import numba
import numba.core.entrypoints as entrypoints
import peaksift

events = peaksift.read_events(sys.argv[1])[:3000]

@numba.njit
def total_pt(muons):  # a user's kernel over an awkward array: needs awkward's extension
    s = 0.0
    for event in muons:
        for mu in event:
            s += mu.pt
    return s

def busy_events(ev):  # a callable event cut that compiles such a kernel on first use
    return ak.num(ev.muon) >= 2 if total_pt(ev.muon) > 0 else ak.num(ev.muon) < 0

cut = busy_events if sys.argv[2] == "user-kernel-in-cut" else None
if sys.argv[2] == "user-kernel-in-thread":
    # another thread compiles its kernel while this one is inside pair()'s kernel section
    import threading
    import peaksift.pairing.build as pairing

    inner = pairing._pair_selected
    seen = []

    def with_other_thread(*args, **kwargs):
        t = threading.Thread(target=lambda: seen.append(total_pt(events.muon)))
        t.start()
        t.join()
        return inner(*args, **kwargs)

    pairing._pair_selected = with_other_thread
cands = peaksift.pair(events, "muon", charge="opposite", choose="leading", event_cut=cut)
assert len(cands) > 0
# without a user kernel, the pairing kernels loaded without numba's third-party extensions
print("vector numba extension loaded:", "vector.backends._numba_object" in sys.modules)
print("extensions pending:", entrypoints._already_initialized is False)
print("same sum:", abs(total_pt(events.muon) - float(ak.sum(events.muon.pt))) < 1e-3)
"""


@pytest.mark.parametrize("mode, loaded", [("plain", False), ("user-kernel-in-cut", True),
                                          ("user-kernel-in-thread", True)])
def test_pair_leaves_numba_extensions_to_later_compilations(tmp_path, demo_dir, mode, loaded):
    # In a fresh interpreter: pair() loads its kernels without running numba's extension
    # entry points (a worker's start-up saving), and a numba function over an awkward array
    # compiles later, inside a callable cut of that first pair() call, and in another thread
    # while pair() loads its kernels, with awkward's own sum as the reference.
    import subprocess
    import sys

    script = tmp_path / "later.py"
    script.write_text(_EXTENSIONS_LATER)
    done = subprocess.run([sys.executable, str(script), str(demo_dir / "events_000.parquet"),
                           mode], capture_output=True, text=True, timeout=300, check=False)
    assert done.returncode == 0, done.stderr[-2000:]
    out = done.stdout
    assert out.splitlines() == [f"vector numba extension loaded: {loaded}",
                                f"extensions pending: {not loaded}", "same sum: True"], out


def test_candidates_select_like_numpy_columns(random_rows):
    """Slicing, boolean masks and position arrays select the same rows numpy's own indexing
    selects from each column (reference: numpy's basic and advanced indexing rules)."""
    cands = pair(_events(muon=_collection(random_rows[0])), "muon", charge="opposite")
    assert len(cands) > 20
    m = cands.mass
    for index in (slice(3, 17, 2), m > np.median(m), np.array([5, 0, 5, len(m) - 1])):
        sub = cands[index]
        assert isinstance(sub, Candidates)
        for k in Candidates._COLUMNS:
            np.testing.assert_array_equal(getattr(sub, k), getattr(cands, k)[index])
        np.testing.assert_array_equal(sub.multiplicity, cands.multiplicity[index])
        assert sub.cutflow == cands.cutflow and sub.choose == cands.choose
    assert cands[-1]["mass"] == m[-1] and cands[0]["event_index"] == cands.event_index[0]
    with pytest.raises(InputError, match="does not exist"):
        cands[len(m)]
    with pytest.raises(InputError, match="boolean mask of length"):
        cands[np.ones(3, dtype=bool)]
