"""One convention across the result types: value ± error, names as in results.json,
from_dict(to_dict()) gives the result back, short reprs and notebook HTML, plot() returns a
matplotlib Figure and leaves the user's backend alone.

The numbers themselves are checked elsewhere against outside references; here the surface:
every check compares two independent routes (the Python attribute and the JSON entry, the
result and its JSON round trip, the backend before and after).
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

import peaksift
from peaksift import FitResult, LimitResult, MassHistogram, ScanResult, SearchResult

REPO = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def search(small_demo):
    """A quick search on the small demo set (few toys, few limit points, no calibration;
    its low counts make every limit a toy limit, of 20 toys)."""
    from peaksift.config import load_config

    cfg = load_config(REPO / "demo_data" / "search.toml").with_overrides(
        input__files=[str(p) for p in sorted(small_demo.glob("*.parquet"))],
        significance__toys=20, limits__points=5, limits__toys=20, calibration__particle="",
        calibration__window=None)
    return peaksift.run_search(cfg, out=False, progress=False)


def _json(d):
    return json.loads(json.dumps(d))


def test_value_and_error_read_the_same_in_python_and_json(search):
    fit = search.fit
    d = fit.to_dict()
    for name in ("peak_mass", "width", "fwhm", "signal_yield", "background_yield"):
        m = getattr(fit, name)
        value, error = m  # every one unpacks as value, error ...
        assert m.value == value and m.error == error and float(m) == value
        assert d[name]["value"] == pytest.approx(value, rel=1e-12)  # ... under its JSON name
        assert d[name]["error"] == pytest.approx(error, rel=1e-12)
        assert " \u00b1 " in str(m)
    assert fit.peak_mass.error == fit.peak_mass_error
    assert fit.signal_yield.error == fit.errors["signal_yield"]


@pytest.mark.parametrize("kind", ["fit", "scan", "limits"])
def test_from_dict_gives_the_result_back(search, kind):
    res = getattr(search, kind)
    cls = {"fit": FitResult, "scan": ScanResult, "limits": LimitResult}[kind]
    back = cls.from_dict(_json(res.to_dict()))
    assert back == res
    assert _json(back.to_dict()) == _json(res.to_dict())


def test_search_result_from_results_json(search):
    d = _json(search.to_dict())
    back = SearchResult.from_dict(d)
    again = _json(back.to_dict())
    for key in ("fit", "background_fit", "scan", "best", "limits", "input", "blinding"):
        assert again[key] == d[key], key
    assert back.fit == search.fit and back.limits == search.limits


@pytest.mark.parametrize("kind", ["fit", "scan", "limits", "search", "histogram"])
def test_short_repr_and_notebook_html(search, kind):
    obj = search if kind == "search" else getattr(search, kind)
    text = repr(obj)
    assert len(text) < 1200 and "config" not in text.lower().split("(")[0]
    page = obj._repr_html_()
    assert page.startswith("<div>") and "</table>" in page
    if kind == "search":
        assert "not a discovery" in text
    if kind == "limits":
        assert not text.startswith("LimitResult(best expected")


def test_describe_repr_is_the_inspect_text(small_demo):
    desc = peaksift.describe(small_demo)
    assert repr(desc) == str(desc) and "collections:" in repr(desc)
    assert desc._repr_html_().startswith("<pre>")
    d = _json(desc.to_dict())
    assert type(desc).from_dict(d) == desc and all(hasattr(desc, k) for k in d)


_PLOTS = """
import importlib, json, sys
import matplotlib
matplotlib.use("{backend}")
before = matplotlib.get_backend()
from matplotlib.figure import Figure
made = {{}}
for kind, (module, name, calls, d) in json.load(open(sys.argv[1])).items():
    res = getattr(importlib.import_module(module), name).from_dict(d)
    for kw in calls:
        made[f"{{kind}} {{kw}}"] = type(res.plot(**kw)).__name__
print(json.dumps({{"figures": made, "backend": matplotlib.get_backend() == before,
                  "pyplot": "matplotlib.pyplot" in sys.modules}}))
"""

#: what test_plot_returns_a_figure_and_leaves_the_backend draws of each result type besides
#: its default figure (one each keeps the test short: the figures themselves are checked
#: where they are drawn, test_output_figures and test_search)
_FIGURES = {"search": [{"which": "background_envelope"}],
            "identification": [{"hypotheses": ["pion"]}],
            "combined_search": [{"which": "a/spectrum"}]}


def test_plot_returns_a_figure_and_leaves_the_backend(results, tmp_path):
    """In a fresh interpreter with an interactive-capable backend chosen by the user, every
    result type read back from its JSON draws each of its figures with plot(), which
    returns a Figure; the backend is unchanged and pyplot is never imported."""
    todo = {}
    for kind in [*KINDS, "histogram"]:
        if kind == "dedx_fit":  # a part of the identification record, whose plot draws it
            continue
        res = results[kind]
        todo[kind] = (type(res).__module__, type(res).__name__, _FIGURES.get(kind, [{}]),
                      _json(res.to_dict()))
    path = tmp_path / "results.json"
    path.write_text(json.dumps(todo))
    code = _PLOTS.format(backend="svg")  # a backend other than Agg, set by the "user"
    out = subprocess.run([sys.executable, "-c", code, str(path)],
                         capture_output=True, check=False,
                         text=True, cwd=REPO, env={"PYTHONPATH": str(REPO / "src"),
                                                   "PATH": "/usr/bin:/bin"})
    assert out.returncode == 0, out.stderr[-2000:]
    got = json.loads(out.stdout.strip().splitlines()[-1])
    expected = {f"{k} {kw}": "Figure" for k, (_, _, calls, _) in todo.items() for kw in calls}
    assert got == {"figures": expected, "backend": True, "pyplot": False}


def test_background_candidate_figure(results):
    """A background candidate read back from its JSON draws its fit: the spectrum with the
    fit and the pulls beneath, the mass axis named with the pair's symbol; the pulls it
    draws are (n - mu)/sqrt(mu) of its kept counts (computed here), and its fitted counts
    sum to the observed ones (the extended Poisson fit's normalisation condition,
    d NLL / d b = 0; to 1e-6)."""
    from peaksift.stats.background_choice import BackgroundCandidate

    cand = results["background_candidate"]
    back = BackgroundCandidate.from_dict(_json(cand.to_dict()))
    assert back == cand
    n, mu = np.asarray(back.observed), np.asarray(back.expected)
    assert np.sum(mu) == pytest.approx(np.sum(n), rel=1e-6)
    fig = back.plot(symbol=r"m_{\mu\mu}")
    top, pulls = fig.axes
    assert top.get_ylabel() == "candidates / 1 GeV" and pulls.get_ylabel() == "pull"
    assert pulls.get_xlabel() == r"$m_{\mu\mu}$ [GeV]"
    drawn = pulls.patches[0].get_path().vertices[:, 1]  # the stairs of the pulls
    assert np.allclose(sorted(set(np.round(drawn, 9))),
                       sorted(set(np.round(np.r_[0.0, (n - mu) / np.sqrt(mu)], 9))))


def test_window_snapping_is_reported():
    h = MassHistogram(bins=90, range=(110.0, 200.0)).fill(
        110 + np.random.default_rng(3).exponential(30.0, 3000))
    fr = peaksift.fit(h, "gaussian", "exponential", window=(50.0, 300.0),
                      start={"mass": 150.0, "sigma": 2.0})
    assert fr.window == (110.0, 200.0)
    assert any("snapped" in n and "110-200" in n for n in fr.notes)


def _same(python, stored):
    """An attribute and its JSON entry hold the same numbers (None where NaN)."""
    if isinstance(python, float) and hasattr(python, "error"):  # a Measurement
        return stored == {"value": _json(python.value), "error": _json(python.error)}
    if isinstance(python, (np.ndarray, list, tuple)) and isinstance(stored, list):
        if any(isinstance(v, dict) for v in stored):  # results in a list: from_dict checks
            return True
        if not all(v is None or isinstance(v, (int, float, list)) for v in stored):
            return _json(list(python)) == stored  # names, notes
        a = np.array([np.nan if v is None else v for v in np.ravel(stored)], float)
        return np.allclose(np.asarray(python, float).ravel(), a, rtol=1e-12, equal_nan=True)
    if isinstance(python, (int, float, str, bool)) and not isinstance(python, np.generic):
        nan = isinstance(python, float) and np.isnan(python)
        return stored == _json(python) or (stored is None and nan)
    return True  # structures: their parts are checked by from_dict(to_dict(x)) == x


@pytest.fixture(scope="module")
def results(search):
    """Every result type, built once."""
    from peaksift import shapes
    from peaksift.search.common import _blinded_copy
    from peaksift.search.result import SpectrumResult
    from peaksift.search.sideband import sideband_fit
    from peaksift.stats.background_choice import choose_background
    from peaksift.stats.envelope import envelope_scan

    cfg = search.config
    sb = sideband_fit(_blinded_copy(search.histogram, (145.0, 160.0)), "gaussian",
                      cfg.model.background, cfg.spectrum.window, (145.0, 160.0))
    # two candidates, a blinded stretch (None in the JSON) and a spurious-signal term
    env = envelope_scan(search.histogram, {"exp": shapes.get("exppoly", order=1),
                                           "power": shapes.get("powersum", terms=1)},
                        "gaussian", np.linspace(120.0, 180.0, 13), window=cfg.spectrum.window,
                        blind=(145.0, 160.0), absolute_resolution=2.0,
                        spurious={"exp": 0.3})
    comb, chans = _combination(search)
    climits = _combined_limits(chans)
    out = {"fit": search.fit, "background_fit": search.background_fit,
           "scan": search.scan, "limits": search.limits, "sideband_fit": sb,
           "envelope": env, "combination": comb,
           "combined_limits": climits, "search": search,
           "combined_search": _combined_search(search, comb, climits),
           "histogram": search.histogram, "signal_model": _signal_model(),
           "background_choice": choose_background(search.histogram, {"exppoly": [1, 2]},
                                                  window=cfg.spectrum.window),
           "spectrum": SpectrumResult(config=cfg, histogram=search.histogram,
                                      collected=search.collected)}
    out["background_candidate"] = out["background_choice"].candidates[0]
    out["identification"] = _identification()
    out["dedx_fit"] = out["identification"].calibration_fit
    return out


def _identification():
    """A search's dE/dx identification record, from hand-made pion tracks: dE/dx drawn
    about the response's Bethe curve with a 7 % Gaussian spread, the scale fitted, the
    density filled (the numbers are checked in test_identification; here the surface)."""
    from peaksift.energy_loss import DedxResponse, fit_dedx_response
    from peaksift.search.identification import P_EDGES, DedxOutcome

    rng = np.random.default_rng(17)
    truth = DedxResponse(scale=2.5)
    p = rng.uniform(0.3, 0.7, 400)
    d = truth.expected(p, 0.13957) * (1 + 0.07 * rng.standard_normal(p.size))
    fit = fit_dedx_response(p, d, DedxResponse(), hypothesis="pion")
    d_edges = np.linspace(0.0, 12.0, 41)
    return DedxOutcome(fit.response, fit, p.size, P_EDGES, d_edges,
                       np.histogram2d(p, d, bins=(P_EDGES, d_edges))[0])


def _signal_model():
    from peaksift.search.signal import search_signal_model

    return search_signal_model(peaksift.load_config(REPO / "demo_data" / "dimuon.toml"))


def _combination(search):
    """Two channels (the demo spectrum and a half-size copy), a shared luminosity
    uncertainty (so the nuisances are in it), blinded, with an expected cross section."""
    from peaksift import Resolution
    from peaksift.stats.channels import Channel, combine

    h = search.histogram
    half = MassHistogram(h.edges)
    half.weight_sum = np.floor(np.asarray(h.weight_sum, float) / 2)
    half.weight_sq_sum = half.weight_sum.copy()
    chans = [Channel(n, hist, "exponential", lumi, signal="gaussian",
                     resolution=Resolution.absolute(2.0), efficiency=0.5,
                     window=search.config.spectrum.window, luminosity_uncertainty=0.02,
                     luminosity_group="run")
             for n, hist, lumi in (("a", h, 10.0), ("b", half, 5.0))]
    return combine(chans, np.linspace(120.0, 180.0, 7), blind=(145.0, 160.0),
                   expected_cross_section=1.0, refit=False), chans


def _combined_limits(chans):
    """Asymptotic and toy limits in one result: toys below 3 background events under the
    signal, at 170 GeV (and at every mass of channel b); 20 toys: the surface is tested,
    not the numbers."""
    from peaksift.stats.channel_limits import combined_limits

    return combined_limits(chans, np.linspace(130.0, 170.0, 3), toys=20,
                           low_count_background=3.0)


def _combined_search(search, comb, climits):
    """A combination's result as run_combination assembles it, from the parts above (two
    channels that are the same demo search: the surface, not the numbers, is tested)."""
    from peaksift.search.combination import CombinedSearchResult

    return CombinedSearchResult(
        channels={"a": search, "b": search}, combination=comb,
        best=comb.global_significance("upcrossings", toys=0),
        limits=climits, source="<dict>", notes=("a note",))


#: every result type the API convention covers (the tests below run on each)
KINDS = ["fit", "background_fit", "scan", "limits", "sideband_fit", "envelope",
         "combination", "combined_limits", "search", "combined_search", "signal_model",
         "background_choice", "background_candidate", "spectrum", "identification",
         "dedx_fit"]


def test_every_public_result_type_is_covered(results):
    """The types above are every frozen result class of the package (a new one must join
    the convention's tests): each class with ``to_dict`` among peaksift's public results."""
    import importlib
    import pkgutil

    from peaksift._values import FrozenValue

    covered = {type(results[k]) for k in [*KINDS, "histogram"]}
    found = set()
    for info in pkgutil.walk_packages(peaksift.__path__, "peaksift."):
        if info.name.rsplit(".", 1)[-1].startswith("_") or "simulate" in info.name:
            continue
        mod = importlib.import_module(info.name)
        for obj in vars(mod).values():
            if (isinstance(obj, type) and obj.__module__ == mod.__name__
                    and (obj.__name__.endswith("Result") or issubclass(
                        obj, FrozenValue))
                    and not obj.__name__.startswith("_")):
                found.add(obj)
    assert found <= covered, sorted(c.__name__ for c in found - covered)


def _public_classes_with_to_dict():
    """Every public class of the package (not the demo generator's) with a ``to_dict``."""
    import importlib
    import pkgutil

    found = {}
    for info in pkgutil.walk_packages(peaksift.__path__, "peaksift."):
        if any(part.startswith("_") for part in info.name.split(".")) or "simulate" in info.name:
            continue
        mod = importlib.import_module(info.name)
        for obj in vars(mod).values():
            if (isinstance(obj, type) and obj.__module__ == mod.__name__
                    and not obj.__name__.startswith("_") and hasattr(obj, "to_dict")):
                found[obj.__name__] = obj
    return found


def _value_types():
    """One instance of each public value type with ``to_dict`` that is not a result above,
    with its way back from the JSON (``from_dict`` unless named)."""
    from peaksift import Resolution
    from peaksift.energy_loss import DedxResponse, Material, mixture
    from peaksift.likelihood.constraints import Constraint
    from peaksift.likelihood.nuisances import SignalNuisances
    from peaksift.resonances import KnownMatch

    own = Material("own_gas", 0.45, 190.0, 1.7e-3, 11.9, 1.76, 4.49, 0.197, 2.96)
    return {
        "Material": (mixture("ar_co2", {"argon_gas": 80.0, "co2_gas": 20.0}), None),
        "DedxResponse": (DedxResponse(own, scale=1.3, resolution=0.06, samples_field="n",
                                      reference_samples=40.0, samples_exponent=0.5), None),
        "Resolution": (Resolution.table([(100.0, 1.0), (200.0, 2.5)]), None),
        "KnownMatch": (KnownMatch("Z0", 23, 91.1876, 0.0021, 2.4952, 0.0, 0.3), None),
        "Constraint": (Constraint.lognormal(1.0, 0.05), Constraint.coerce),
        "SignalNuisances": (SignalNuisances.make({"luminosity": 0.02, "efficiency": 0.05},
                                                 {}), None),
        "Config": (peaksift.load_config(REPO / "demo_data" / "search.toml"),
                   peaksift.load_config),
    }


def test_every_public_type_with_to_dict_reads_back(results):
    """Every public class with ``to_dict`` -- the results above and the value types they
    are built from -- is given back equal by its way back from the JSON."""
    values = _value_types()
    covered = {type(results[k]).__name__ for k in [*KINDS, "histogram"]}
    covered.add("Description")  # test_describe_repr_is_the_inspect_text
    found = _public_classes_with_to_dict()
    assert set(found) <= covered | set(values), sorted(set(found) - covered - set(values))
    for name, (obj, back) in values.items():
        again = (back or type(obj).from_dict)(_json(obj.to_dict()))
        if name == "Config":  # read back from the echo: the same settings
            assert _json(again.to_dict()) == _json(obj.to_dict())
        else:
            assert again == obj, name


@pytest.mark.parametrize("kind", KINDS)
def test_json_keys_are_the_python_attribute_names(results, kind):
    """Every key results.json writes for a result is an attribute of the same name holding
    the same numbers, and the result read back from the JSON equals the one written."""
    res = results[kind]
    d = _json(res.to_dict())
    keys = [k for k in d if k not in ("kind", "outputs")]  # kind: a tag, not a value
    missing = [k for k in keys if not hasattr(res, k)]
    assert not missing, f"{type(res).__name__}: JSON keys without an attribute: {missing}"
    differ = [k for k in keys if not _same(getattr(res, k), d[k])]
    assert not differ, f"{type(res).__name__}: attribute and JSON differ for {differ}"
    back = type(res).from_dict(d)
    if kind == "search":  # without the event-level data: the sections it keeps are equal
        assert back.fit == res.fit and back.scan == res.scan and back.limits == res.limits
        assert back.background_fit == res.background_fit
    else:
        assert back == res
    if kind == "combined_search":  # the value equality is not blind: a change shows
        import dataclasses

        assert dataclasses.replace(back, best={**back.best, "z_local": 0.0}) != res
        assert _json(back.to_dict()) == {k: v for k, v in d.items() if k != "outputs"}


@pytest.mark.parametrize("kind", [*KINDS, "histogram"])
def test_every_result_has_a_short_repr_and_notebook_html(results, kind):
    """The notebook surface of every result type: a short repr (no config dump, no arrays;
    a fit's is its parameter table) and an HTML table."""
    res = results[kind]
    text = repr(res)
    assert text.startswith(type(res).__name__ + "(") and len(text) < 1200, text
    assert "array(" not in text and "config" not in text.lower()
    page = res._repr_html_()
    assert page.startswith("<div>") and "</table>" in page


def test_combination_results_json_of_earlier_versions_still_loads(results):
    """A combination results.json written before its keys took the attribute names
    (``config_path``, ``channel_names``, the combined numbers under ``combined``) loads:
    the combined scan, best hypothesis and limits read the same; what the old layout did
    not keep is said in the notes."""
    from peaksift.search.combination import CombinedSearchResult

    res = results["combined_search"]
    d = _json(res.to_dict())
    comb, lim = d["combination"], d["limits"]
    keys = ("masses", "z_local", "p_local", "q0", "cross_section", "cross_section_error",
            "unit", "z_expected", "expected_cross_section", "best", "blind")
    old = {"peaksift_version": "0.0", "kind": "combination", "config_path": d["source"],
           "channel_names": list(d["channels"]), "channels": d["channels"],
           "combined": {**{k: comb[k] for k in keys}, "nuisances": d["nuisances_at_best"],
                        "global": d["best"], "notes": d["notes"],
                        "limits": {k: v for k, v in lim.items() if k != "channels"}}}
    back = CombinedSearchResult.from_dict(old)
    for name in ("masses", "z_local", "p_local", "cross_section"):
        assert np.array_equal(getattr(back.combination, name), getattr(res.combination, name),
                              equal_nan=True), name
    assert back.combination.best_mass == res.combination.best_mass
    assert back.best == res.best and back.source == res.source
    for name in ("masses", "observed", "expected", "expected_minus2", "expected_plus2"):
        assert np.array_equal(getattr(back.limits, name), getattr(res.limits, name),
                              equal_nan=True), name
    assert any("earlier layout" in n for n in back.notes)


def test_results_json_of_earlier_versions_still_loads(search):
    """Files written before the keys took the attribute names (``mass`` for the masses,
    ``background_only_fit``) load the same."""
    d = _json(search.to_dict())
    old = {**d, "background_only_fit": d["background_fit"]}
    del old["background_fit"]
    old["scan"] = {("mass" if k == "masses" else k): v for k, v in d["scan"].items()}
    old["limits"] = {("mass" if k == "masses" else k): v for k, v in d["limits"].items()}
    back = SearchResult.from_dict(old)
    assert back.scan == search.scan and back.limits == search.limits
    assert back.background_fit == search.background_fit


def test_envelope_dict_of_earlier_versions_still_loads(results):
    """An EnvelopeResult dict written before the keys took the attribute names (``mass``,
    ``functions``, ``spurious_weights``, the chosen functions by label) loads the same."""
    from peaksift.stats.envelope import EnvelopeResult

    env = results["envelope"]
    d = _json(env.to_dict())
    old = {k: v for k, v in d.items() if k not in ("masses", "labels", "spurious",
                                                  "best_index", "best_mass")}
    old.update(mass=d["masses"], functions=d["labels"], spurious_weights=d["spurious"],
               chosen=[d["labels"][c] for c in d["chosen"]],
               null_choice=d["labels"][d["null_choice"]])
    assert EnvelopeResult.from_dict(old) == env
