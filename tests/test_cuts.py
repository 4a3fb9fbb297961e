"""Cut expressions: values against Python's own semantics, refusals with positions, masks,
callables, pickling, and a property test that arbitrary text never runs code.

Reference for values: the Python language reference (comparison chaining, ``and``/``or``/
``not``, operator precedence) with the ``math`` module's functions, evaluated row by row on
trusted test strings -- the cut module itself never evaluates code.
"""

from __future__ import annotations

import builtins
import math
import pickle
import sys

import awkward as ak
import numpy as np
import pytest
import vector
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from peaksift.cuts import FUNCTIONS, Cut, compile_cut, event_mask, event_names, object_mask
from peaksift.errors import CutError

vector.register_awkward()

N = 200
_rng = np.random.default_rng(11)
COLS = {
    "pt": 1.0 + _rng.exponential(30.0, N),
    "eta": _rng.uniform(-3, 3, N),
    "phi": _rng.uniform(-math.pi, math.pi, N),
    "isolation": _rng.exponential(0.1, N),
    "charge": _rng.choice(np.array([-1, 1], dtype=np.int32), N),
    "tight": _rng.uniform(size=N) < 0.6,
}

_MATH = {
    "abs": abs, "sqrt": math.sqrt, "exp": math.exp, "log": math.log, "log10": math.log10,
    "log2": math.log2, "cos": math.cos, "sin": math.sin, "tan": math.tan, "acos": math.acos,
    "asin": math.asin, "atan": math.atan, "cosh": math.cosh, "sinh": math.sinh,
    "tanh": math.tanh, "atan2": math.atan2, "hypot": math.hypot, "min": min, "max": max,
    "pi": math.pi,
}


def _python_reference(expr: str) -> np.ndarray:
    """Row-by-row Python evaluation of a trusted test expression (the reference)."""
    out = []
    for r in range(N):
        row = {k: (bool(v[r]) if v.dtype == bool else float(v[r])) for k, v in COLS.items()}
        # the reference only: trusted literals written in this file, no builtins
        out.append(bool(eval(expr, {"__builtins__": {}}, {**_MATH, **row})))
    return np.array(out)


@pytest.mark.parametrize("expr", [
    "pt > 25 and abs(eta) < 2.4 and isolation < 0.15",
    "20 < pt <= 60",
    "0 < isolation < 0.1 < pt",
    "not (pt > 30) or tight",
    "not tight and not pt > 10",
    "sqrt(pt) * cosh(eta) > 8",
    "max(pt, 40) == 40 and min(pt, isolation * 100, 50) > 3",
    "-eta ** 2 > -1",
    "2 ** -1 * pt > 10",
    "exp(-isolation) > 0.9 or log(pt) < 2",
    "charge == -1 and pt >= 10",
    "atan2(sin(phi), cos(phi)) > 0",
    "hypot(pt, eta) > 30 or False",
    "tight != (pt > 30)",
    "pt / (1 + isolation) - 5 * abs(tanh(eta)) > 12",
    "pt * 2 > 50 == True",
    "(pt > 20) + (abs(eta) < 1) >= 2",
    "acos(cos(phi)) < pi / 2 and asin(sin(phi / 4)) > -0.5 and atan(eta) < 1",
    "log10(pt) + log2(pt) - sinh(eta) + tan(phi / 3) > 2",
])
def test_values_match_python_semantics(expr):
    got = compile_cut(expr).evaluate(COLS, N)
    assert got.dtype == np.bool_ and got.shape == (N,)
    np.testing.assert_array_equal(got, _python_reference(expr))


def test_every_whitelisted_function_is_exercised():
    used = set()
    for expr in test_values_match_python_semantics.pytestmark[0].args[1]:
        used |= {f for f in FUNCTIONS if f + "(" in expr}
    assert used == set(FUNCTIONS)


def test_constants_and_broadcast():
    assert compile_cut("True").evaluate(COLS, N).all()
    assert not compile_cut("1 > 2").evaluate(COLS, N).any()
    assert compile_cut("  pt > 0\n and\teta < 10").evaluate(COLS, N).all()  # newlines/tabs
    # division by zero and log of a negative give inf/NaN; comparisons with NaN are false
    assert not compile_cut("log(-pt) > 0 or log(-pt) <= 0").evaluate(COLS, N).any()
    assert compile_cut("pt / 0 > 1e308").evaluate(COLS, N).all()
    assert compile_cut("9 ** 9 ** 9 > pt").evaluate(COLS, N).all()  # float overflow -> inf


def _err(expr: str, cols=COLS) -> CutError:
    with pytest.raises(CutError) as info:
        compile_cut(expr).evaluate(cols, N, where="collection 'muon'")
    msg = str(info.value)
    assert "\n" not in msg  # one line for the command line
    assert repr(expr) in msg or expr[:50] in msg  # quotes the expression
    return info.value


@pytest.mark.parametrize("expr,pos,what", [
    ("pt > 25 and foo.bar < 1", 16, "attribute access"),
    ("pt[0] > 1", 3, "subscripts"),
    ("pt > 25 & eta < 2", 9, "the operator '&' is not allowed; use 'and'"),
    ("pt > 1 | tight", 8, "use 'or'"),
    ("pt > 1 % 2", 8, "'%' is not allowed"),
    ("pt > 1 // 2", 8, "'//' is not allowed"),
    ("~tight", 1, "'~' is not allowed"),
    ("pt > > 3", 6, "not a valid expression"),
    ("pt >", 5, "not a valid expression"),
    ("abs(eta", 4, "never closed"),
    ("lambda x: x", 1, "lambda"),
    ("'abc' == pt", 1, "strings are not allowed"),
    ("pt > 'a'", 6, "strings are not allowed"),
    ("pt > b'a'", 6, "strings are not allowed"),
    ("pt > 1j", 6, "complex numbers"),
    ("pt > None", 6, "None"),
    ("__class__ > 1", 1, "names starting with '__'"),
    ("open('f') > 1", 1, "unknown function 'open'"),
    ("sqr(pt) > 1", 1, "did you mean 'sqrt'"),
    ("abs(x=pt) > 1", 7, "keyword arguments"),
    ("abs(*pt) > 1", 5, "starred"),
    ("abs(pt, eta) > 1", 1, "abs() takes 1 argument(s), got 2"),
    ("max(pt) > 1", 1, "max() takes at least 2"),
    ("(lambda: 1)() > 0", 2, "only the whitelisted functions"),
    ("[x for x in pt]", 1, "comprehensions"),
    ("pt if eta else 1", 1, "'if ... else'"),
    ("pt in (1, 2)", 1, "'in' comparisons"),
    ("pt is 1", 1, "'is' comparisons"),
    ("(x := 1) > 0", 2, "assignments"),
    ("pt > 1, eta < 2", 1, "tuples"),
    ("{1: 2} > pt", 1, "dictionaries"),
    ("f'{pt}' > 1", 1, "strings are not allowed"),
    ("abs > 1", 1, "'abs' is a function"),
    ("pt + 1", 1, "gives a number, not a true/false condition"),
    ("1 and pt > 1", 1, "the operand of 'and' is a number"),
    ("not pt * 2", 5, "the operand of 'not' is a number"),
    ("", 1, "empty"),
    ("pt > 1" + "0" * 5000, 1, "characters long"),
    ("pté > 1 and x.y", 14, "attribute access"),  # positions count characters, not bytes
])
def test_refusals_point_at_the_character(expr, pos, what):
    exc = _err(expr)
    msg = str(exc)
    if "characters long" not in msg:
        assert f"at character {pos} " in msg, msg
        assert exc.position == pos - 1
    assert what in msg, msg


@pytest.mark.skipif(sys.version_info < (3, 11), reason="exception notes arrived in Python 3.11")
def test_caret_note_for_interactive_use():
    with pytest.raises(CutError) as info:
        compile_cut("pt > 25 and eta.x < 2")
    note = info.value.__notes__[0]
    line, caret = note.splitlines()
    assert line.strip() == "pt > 25 and eta.x < 2"
    assert line.index("eta.x") + 3 == caret.index("^")


def test_unknown_field_lists_fields_and_closest():
    exc = _err("pt > 25 and isolaton < 0.1")
    msg = str(exc)
    assert "at character 13 ('i'): unknown name 'isolaton'" in msg
    assert "collection 'muon' has: charge, eta, isolation, phi, pt, tight" in msg
    assert "did you mean 'isolation'?" in msg


def test_value_type_errors_at_evaluation():
    assert "'pt' holds numbers" in str(_err("pt and tight"))
    assert "'pt' holds numbers" in str(_err("pt"))
    bad = {**COLS, "name": np.array(["a"] * N)}
    assert "not a plain number or flag" in str(_err("name > 1", bad))
    short = {**COLS, "pt": COLS["pt"][:5]}
    assert "has 5 values" in str(_err("pt > 1", short))


def test_names_check_and_pickle():
    c = compile_cut("pt > 25 and abs(eta) < 2.4 and pt < 1000 and tight")
    assert c.names == ("pt", "eta", "tight")
    c.check(COLS)
    with pytest.raises(CutError, match="unknown name 'tight'.*has: eta, pt"):
        c.check(["pt", "eta"], where="collection 'electron'")
    back = pickle.loads(pickle.dumps(c))
    assert isinstance(back, Cut) and back == c and hash(back) == hash(c)
    np.testing.assert_array_equal(back.evaluate(COLS, N), c.evaluate(COLS, N))
    assert compile_cut(c) is c
    with pytest.raises(CutError, match="must be text"):
        compile_cut(3)


# ---------------------------------------------------------------- on awkward data
def _events():
    mu = ak.zip({"pt": [[30.0, 10.0], [], [50.0, 45.0, 5.0]],
                 "eta": [[0.1, 2.6], [], [-1.0, 0.3, 0.0]],
                 "phi": [[0.0, 1.0], [], [2.0, -2.0, 0.5]],
                 "mass": [[0.1, 0.1], [], [0.1, 0.1, 0.1]]}, with_name="Momentum4D")
    met = ak.zip({"pt": [12.0, 80.0, 30.0], "phi": [0.0, 1.0, 2.0]})
    return ak.zip({"muon": mu, "met": met, "weight": [1.0, 0.5, 2.0]}, depth_limit=1)


def test_object_mask_text_callable_and_mask_agree():
    ev = _events()
    want = [[True, False], [], [True, True, False]]
    for cut in ("pt > 20 and abs(eta) < 2.4", compile_cut("pt > 20 and abs(eta) < 2.4"),
                lambda m: (m.pt > 20) & (abs(m.eta) < 2.4),
                (ev.muon.pt > 20) & (abs(ev.muon.eta) < 2.4)):
        assert object_mask(ev.muon, cut, name="muon").tolist() == want
    assert compile_cut("pt > 20").object_mask(ev.muon).tolist() == [[True, False], [],
                                                                      [True, True, False]]
    with pytest.raises(CutError, match="does not match the collection"):
        object_mask(ev.muon, ak.Array([[True], [], [True, True, True]]), name="muon")
    with pytest.raises(CutError, match="holds float64 values, not true/false"):
        object_mask(ev.muon, lambda m: m.pt, name="muon")
    with pytest.raises(CutError, match="jagged collection of records"):
        object_mask(ev.weight, "pt > 1")


def test_event_level_names_and_masks():
    ev = _events()
    assert set(event_names(ev)) == {"weight", "n_muon", "met_pt", "met_phi"}
    assert event_mask(ev, "n_muon >= 2 and met_pt < 50").tolist() == [True, False, True]
    assert compile_cut("weight > 0.7").event_mask(ev).tolist() == [True, False, True]
    assert event_mask(ev, lambda e: ak.num(e.muon) == 0).tolist() == [False, True, False]
    assert event_mask(ev, np.array([True, False, False])).tolist() == [True, False, False]
    with pytest.raises(CutError, match=r"unknown name 'n_muons'.*did you mean 'n_muon'"):
        event_mask(ev, "n_muons >= 2")
    with pytest.raises(CutError, match=r"one true/false value per event \(3\)"):
        event_mask(ev, np.array([True, False]))
    with pytest.raises(CutError, match="reduce it"):
        event_mask(ev, lambda e: e.muon.pt > 20)


# ------------------------------------------------------------ property tests
PROBE_CALLS: list[int] = []


def _probe(*args, **kwargs):  # would record a call if any text were ever executed
    PROBE_CALLS.append(1)
    return 1


@pytest.fixture(scope="module", autouse=True)
def _probe_in_builtins():
    builtins.peaksift_probe = _probe  # type: ignore[attr-defined]
    yield
    del builtins.peaksift_probe  # type: ignore[attr-defined]
    assert PROBE_CALLS == []


def _mask_or_cut_error(text: str) -> None:
    try:
        cut = compile_cut(text)
        mask = cut.evaluate(COLS, N, where="collection 'muon'")
    except CutError as exc:
        assert "\n" not in str(exc)
        return
    assert isinstance(mask, np.ndarray) and mask.dtype == np.bool_ and mask.shape == (N,)


_SETTINGS = settings(max_examples=400, deadline=None, derandomize=True,
                     suppress_health_check=[HealthCheck.too_slow])


@_SETTINGS
@given(st.text(max_size=80))
def test_arbitrary_text_gives_mask_or_cut_error(text):
    _mask_or_cut_error(text)
    assert PROBE_CALLS == []


_TOKENS = st.sampled_from([
    "pt", "eta", "charge", "tight", "isolation", "peaksift_probe", "peaksift_probe()",
    "__import__('os').system('true')", "(", ")", "and", "or", "not", "<", ">=", "==", "!=",
    "+", "-", "*", "/", "**", "abs(", "sqrt(", "min(", "max(", "log(", ",", "1", "2.5",
    "1e308", "0", "-1", ".", "[", "]", "'x'", "lambda", ":", "True", "False", "pi", "if",
    "else", "for", "in", "%", "&", "|", "~", "=", ":=", "@", "\\", "é", "\x00", "\n",
])


@_SETTINGS
@given(st.lists(_TOKENS, max_size=14).map(" ".join))
def test_token_soup_gives_mask_or_cut_error(text):
    _mask_or_cut_error(text)
    assert PROBE_CALLS == []


def test_probe_is_never_called_by_explicit_attempts():
    for text in ("peaksift_probe() > 0", "__import__('builtins').peaksift_probe() > 0",
                 "abs(peaksift_probe()) > 0", "pt > (lambda: peaksift_probe())()",
                 "[peaksift_probe() for _ in pt]"):
        with pytest.raises(CutError):
            compile_cut(text).evaluate(COLS, N)
    assert PROBE_CALLS == []


def test_clauses_and_requirement_counts_against_numpy():
    """Each clause of a top-level ``and`` is counted after the ones before it; checked
    against the same requirements written directly in numpy on the flat columns."""
    import awkward as ak

    from peaksift.cuts import clauses, requirement_counts

    assert [c.expression for c in clauses("pt > 20 and (eta < 1 or eta > 2) and 1 < q < 3")] \
        == ["pt > 20", "(eta < 1 or eta > 2)", "1 < q < 3"]
    assert clauses("pt > 20 or eta < 1")[0].expression == "pt > 20 or eta < 1"
    assert clauses(lambda c: c.pt > 1) == ()
    rng = np.random.default_rng(5)
    counts = rng.integers(0, 4, 200)
    n = int(counts.sum())
    pt, eta = rng.exponential(25.0, n), rng.uniform(-3, 3, n)
    coll = ak.unflatten(ak.zip({"pt": pt, "eta": eta}), counts)
    keep_events = rng.random(200) < 0.8
    steps, per_event = requirement_counts(coll, "pt > 20 and abs(eta) < 2.4", name="mu",
                                          keep_events=keep_events)
    kept = np.repeat(keep_events, counts)
    a = kept & (pt > 20)
    b = a & (np.abs(eta) < 2.4)
    assert steps == [("mu objects", int(kept.sum())), ("pt > 20", int(a.sum())),
                     ("abs(eta) < 2.4", int(b.sum()))]
    owner = np.repeat(np.arange(200), counts)
    assert np.array_equal(per_event, np.bincount(owner[b], minlength=200))
