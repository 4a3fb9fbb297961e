"""The configuration schema: every key of every section, its kind, default, range and doc.

One table (``SCHEMA``) declares each key once; validation, the dataclasses' defaults and the
reference page ``docs/config.md`` all read it.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

from .._vocabulary import FIGURES, LIMIT_METHODS, NORMALISATION_RANGES, UNREADABLE_FILES
from ..energy_loss import HYPOTHESES, MATERIALS
from ..resolution import RELATIVE_MAX, relative_problem

_REQUIRED = object()


@dataclass(frozen=True)
class _Key:
    """One configuration key: its kind, default, constraints and documentation."""

    name: str
    kind: str  # str, int, float, bool, choice, window, strings, paths, floats, table, pairs
    default: Any
    doc: str
    choices: tuple[str, ...] = ()
    lo: float | None = None
    hi: float | None = None
    lo_open: bool = False
    hi_open: bool = False
    nullable: bool = False
    # a number's own check (what is wrong, or None) used instead of lo/hi, which then only
    # document the range: for a rule that another layer owns and applies too
    check: Callable[[Any], str | None] | None = None


def _normalisation(name: str) -> dict[str, Any]:
    """lo/hi of a limits key that :func:`peaksift.upper_limits` checks too (declared once)."""
    lo, hi, lo_open = NORMALISATION_RANGES[name]
    return {"lo": lo, "hi": hi, "lo_open": lo_open}


# ------------------------------------------------------------------------------- schema
SCHEMA: dict[str, tuple[_Key, ...]] = {
    "input": (
        _Key("files", "paths", _REQUIRED,
             "Parquet or Arrow IPC (Feather) files, directories, globs or fsspec URLs "
             "(`memory://`, `s3://`, ...); a string or a list. Relative paths are taken from "
             "the directory of the config file."),
        _Key("weights", "bool", True,
             "Use the per-event `weight` column when the files have one."),
        _Key("strict", "bool", False,
             "Stop on NaN/infinite or negative kinematics instead of dropping those objects "
             "with a warning."),
        _Key("hash_inputs", "bool", True,
             "Record each input file's sha256 in results.json (on a Dask cluster the workers "
             "compute it); false leaves it out, for huge or remote inputs."),
        _Key("column_pattern", "str", "{collection}.{field}",
             "How sibling list columns name a collection's fields, with `{collection}` and "
             "`{field}` once each: the default reads `muon.pt, muon.eta, ...` (Arrow's struct "
             "flattening); `{collection}_{field}` reads `muon_pt, ...`. List-of-struct "
             "columns are read whatever the pattern."),
    ),
    "objects": (
        _Key("collection", "str", "muon", "Collection whose objects are paired."),
        _Key("cut", "str", "", "Cut expression on the objects, e.g. "
             "`pt > 25 and abs(eta) < 2.4 and isolation < 0.15`; empty for none."),
        _Key("second_collection", "str", "",
             "Pair `collection` with this other collection (e.g. `electron`); empty pairs "
             "objects of `collection` among themselves."),
        _Key("second_cut", "str", "", "Cut expression on the second collection's objects."),
        _Key("event_cut", "str", "",
             "Event-level cut expression (per-event scalars and object counts)."),
    ),
    "pairing": (
        _Key("charge", "choice", "opposite",
             "Charge requirement on the pair.", choices=("opposite", "same", "any")),
        _Key("choose", "choice", "all",
             "What each event contributes: every pair, the leading pair, the pair with the "
             "largest scalar pT sum, or the pair closest to `target_mass`.",
             choices=("all", "leading", "max_sum_pt", "closest")),
        _Key("target_mass", "float", None, "Mass in GeV for `choose = \"closest\"`.",
             lo=0.0, lo_open=True, nullable=True),
        _Key("min_delta_r", "float", 0.0,
             "Minimum Delta R between the two objects (0 for no requirement).", lo=0.0),
        # --- mass hypotheses per leg (dE/dx identification: the [identification] table)
        _Key("hypotheses", "strings", [],
             "Mass hypothesis of both legs (`[\"kaon\"]`) or of each leg "
             "(`[\"kaon\", \"pion\"]`): each leg gets that particle's mass in place of the "
             "collection's. Two different hypotheses on one collection pair `objects.cut` "
             "(first leg) with `objects.second_cut` (second leg). Empty: the collections' "
             "own masses.", choices=HYPOTHESES),
        _Key("assignment", "choice", "both",
             "When both objects of an unlike pair pass both legs' selections (K pi and pi K): "
             "keep both assignments, or the one whose dE/dx is more probable (smaller sum of "
             "squared standardised deviations; needs [identification]).",
             choices=("both", "more_probable")),
    ),
    # --- dE/dx particle identification (peaksift.energy_loss); used when `resolution` is set
    "identification": (
        _Key("resolution", "float", None,
             "Relative dE/dx resolution sigma/<dE/dx> (at `reference_samples` samples when "
             "`samples_field` is set). Setting it turns identification on: object cuts may "
             "then use `dedx_deviation(kaon)` (pion, kaon, proton, electron, deuteron).",
             lo=0.0, lo_open=True, hi=1.0, nullable=True),
        _Key("material", "choice", "argon_co2_70_30",
             "Medium of the Bethe curve (constants of the PDG atomic and nuclear properties "
             "tables; `argon_co2_70_30` by Bragg additivity), or `own` with the constants in "
             "[identification.own_material].", choices=(*MATERIALS, "own")),
        _Key("field", "str", "dedx", "The track collection's field holding the measured dE/dx."),
        _Key("scale", "float", None,
             "Detector units per MeV cm^2/g (the Bethe curve's calibration); unset: fitted "
             "from the data on `calibration_hypothesis` tracks in `calibration_momentum`.",
             lo=0.0, lo_open=True, nullable=True),
        _Key("calibration_hypothesis", "choice", "pion",
             "Species whose tracks calibrate the scale (they must dominate the momentum band; "
             "others are removed by a 3-sigma clip).", choices=HYPOTHESES),
        _Key("calibration_momentum", "window", [0.4, 0.6],
             "Momentum band `[low, high]` in GeV of the calibration tracks (near minimum "
             "ionisation for pions)."),
        _Key("fit_resolution", "bool", False,
             "Also fit the resolution on the calibration tracks (and use the fitted value)."),
        _Key("samples_field", "str", "",
             "Field with each track's number of dE/dx samples; with it the resolution scales "
             "as `(reference_samples / n) ** samples_exponent`."),
        _Key("reference_samples", "float", None,
             "Number of samples at which `resolution` holds.", lo=0.0, lo_open=True,
             nullable=True),
        _Key("samples_exponent", "float", 0.5,
             "Exponent of the resolution's dependence on the number of samples.",
             lo=0.0, hi=2.0),
        _Key("band", "float", 3.0,
             "Half-width in sigma of the selection band drawn around each pairing hypothesis "
             "in the dE/dx figure (draw the band your cut uses).", lo=0.0, lo_open=True),
    ),
    "identification.own_material": (
        _Key("z_over_a", "float", None, "<Z/A> in mol/g.", lo=0.0, lo_open=True,
             nullable=True),
        _Key("mean_excitation_ev", "float", None, "Mean excitation energy I in eV.",
             lo=0.0, lo_open=True, nullable=True),
        _Key("density", "float", None, "Density in g/cm^3.", lo=0.0, lo_open=True,
             nullable=True),
        _Key("density_effect", "floats", [],
             "Sternheimer's density-effect constants `[C, X0, X1, a, k, delta0]` "
             "(Sternheimer, Berger, Seltzer 1984); empty: no density effect."),
    ),
    "spectrum": (
        _Key("window", "window", _REQUIRED,
             "Fit window `[low, high]` in GeV; the spectrum, fits and scan live here."),
        _Key("bins", "int", 100, "Number of equal bins on the window.", lo=1, hi=100000),
        _Key("bin_width", "float", None,
             "Bin width in GeV; overrides `bins` (the window must hold a whole number).",
             lo=0.0, lo_open=True, nullable=True),
    ),
    "model": (
        _Key("signal", "str", "gaussian",
             "Signal shape of the free fit at the best mass (`peaksift.shapes.available()`)."),
        _Key("background", "str", "exponential", "Background shape name."),
        _Key("signal_options", "table", {}, "Options passed to the signal shape."),
        _Key("background_options", "table", {},
             "Options passed to the background shape, e.g. `{ degree = 3 }`."),
        _Key("fit", "choice", "auto",
             "Binned or unbinned likelihood; `auto` lets the fitter choose.",
             choices=("auto", "binned", "unbinned")),
        _Key("fix", "values", {},
             "Parameters of the free fit held at a value, by name, e.g. "
             "`{ alpha_low = 1.2, n_low = 4.0 }`. Names: the parameters of `model.signal` "
             "and `model.background`, `signal_yield` and `background_yield`."),
        _Key("constrain", "constraints", {},
             "Parameters of the free fit constrained by an outside measurement, by name: "
             "`{ width = { kind = \"gaussian\", center = 30.0, width = 3.0 } }` (`kind`: "
             "{constraint_kinds}; default gaussian). For `lognormal`, `center` is the median "
             "and `width` the relative uncertainty. `[center, width]` is short for a Gaussian."),
        _Key("bounds", "ranges", {},
             "Lower and upper bounds of free-fit parameters, by name, replacing the defaults: "
             "`{ width = [0.0, 100.0] }`."),
        _Key("sigma_from_resolution", "choice", "free",
             "Tie the Gaussian `sigma` of the signal (gaussian, crystalball, voigt) to "
             "`model.resolution`: `fixed` makes it the resolution at the fitted mass "
             "(recomputed as the mass moves), `constrained` a Gaussian constraint of relative "
             "width `resolution_uncertainty` around the resolution at the fit's starting mass; "
             "`free` floats it. "
             "Tie it to measure a natural width with a Voigt signal.",
             choices=("free", "fixed", "constrained")),
        _Key("resolution_uncertainty", "float", None,
             "Relative uncertainty of the resolution model, the width of the constraint when "
             "`sigma_from_resolution = \"constrained\"` (e.g. 0.1 for 10%).",
             lo=0.0, lo_open=True, hi=1.0, nullable=True),
        _Key("intervals", "bool", True,
             "Profile-likelihood (MINOS-type) intervals for the peak mass, its width and the "
             "signal yield of the free fit (in results.json `fit.intervals`, the summary and "
             "the report); `false` leaves only the symmetric errors."),
    ),
    "model.resolution": (
        _Key("relative", "float", None,
             "Relative mass resolution sigma/m (give exactly one of relative, absolute, "
             "table).", lo=0.0, lo_open=True, hi=RELATIVE_MAX, nullable=True,
             check=relative_problem),
        _Key("absolute", "float", None, "Constant mass resolution sigma in GeV.",
             lo=0.0, lo_open=True, nullable=True),
        _Key("table", "pairs", None,
             "Resolution table `[[mass, sigma], ...]` in GeV, interpolated linearly in mass; "
             "it must cover `spectrum.window`.", nullable=True),
        _Key("natural_width", "float", 0.0,
             "Natural width Gamma (GeV) of the hypothesised resonance; with a width > 0 the "
             "scan uses a Voigt signal.", lo=0.0),
    ),
    "scan": (
        _Key("start", "float", None,
             "First mass hypothesis, GeV (default: 3 resolution sigma inside the window).",
             nullable=True),
        _Key("stop", "float", None,
             "Last mass hypothesis, GeV (default: 3 resolution sigma inside the window).",
             nullable=True),
        _Key("step", "float", None,
             "Spacing of hypotheses, GeV (default: half the local resolution sigma).",
             lo=0.0, lo_open=True, nullable=True),
        _Key("points", "int", None, "Number of equally spaced hypotheses (instead of step).",
             lo=2, hi=100000, nullable=True),
        _Key("signal", "str", "",
             "Signal shape used at each hypothesis; empty: `gaussian`, or `voigt` when "
             "`model.resolution.natural_width` > 0."),
    ),
    "significance": (
        _Key("method", "choice", "upcrossings",
             "Global significance: upcrossings (Gross & Vitells 2010) or background-only "
             "toys of the whole scan.", choices=("upcrossings", "toys")),
        _Key("toys", "int", 200,
             "Background-only toys (for `upcrossings`: toys that estimate the upcrossing "
             "rate; 0 uses the observed scan).", lo=0, hi=10_000_000),
        _Key("reference_level", "float", 0.5,
             "Reference level u0 of q0 at which upcrossings are counted.", lo=0.0),
        _Key("seed", "int", 20261201, "Random seed for all toys (results are reproducible).",
             lo=0),
    ),
    "blinding": (
        _Key("enabled", "bool", False,
             "Hide the data in `window` from fits, plots and results until `--unblind`."),
        _Key("window", "window", None, "Blinded mass window `[low, high]`, GeV.",
             nullable=True),
    ),
    "limits": (
        _Key("enabled", "bool", True, "Compute upper limits across the scan range."),
        _Key("cl", "float", 0.95, "Confidence level of the CLs upper limits.",
             lo=0.0, hi=1.0, lo_open=True, hi_open=True),
        _Key("method", "choice", "auto",
             "How the CLs limits are computed: `auto` uses the asymptotic formulae (Cowan "
             "et al. 2011) and toys where too few background events lie under the signal "
             "for them (the expected bands would be misplaced); `asymptotic` uses the "
             "formulae everywhere and flags those masses; `toys` is `auto` plus toys at "
             "`toy_masses`.",
             choices=LIMIT_METHODS),
        _Key("points", "int", 30, "Number of mass points for the limit curve.",
             lo=1, hi=10000),
        _Key("toys", "int", 200, "Toys per mass point where a limit is computed with toys.",
             lo=10, hi=1_000_000),
        _Key("toy_masses", "floats", [],
             "Masses (GeV) where `method = \"toys\"` computes toy-based limits too, each at "
             "the nearest limit point; empty: three masses spread over the range."),
        _Key("luminosity", "float", None,
             "Integrated luminosity in `luminosity_unit`; when given, limits are on "
             "cross-section x branching fraction instead of the signal yield.",
             nullable=True, **_normalisation("luminosity")),
        _Key("luminosity_unit", "choice", "fb^-1", "Unit of `luminosity`.",
             choices=("fb^-1", "pb^-1")),
        _Key("luminosity_uncertainty", "float", 0.0,
             "Relative uncertainty of the luminosity (constrained nuisance parameter).",
             **_normalisation("luminosity_uncertainty")),
        _Key("efficiency", "float", 1.0,
             "Signal efficiency times acceptance.", **_normalisation("efficiency")),
        _Key("efficiency_uncertainty", "float", 0.0,
             "Relative uncertainty of the efficiency (constrained nuisance parameter).",
             **_normalisation("efficiency_uncertainty")),
        _Key("constraint", "choice", "lognormal",
             "Distribution constraining the luminosity and efficiency nuisance parameters.",
             choices=("lognormal", "gaussian")),
    ),
    "systematics": (
        _Key("mass_scale", "float", 0.0,
             "Relative uncertainty of the mass scale (the peak at m(1 + delta)), a nuisance "
             "parameter profiled in the scan, its toys and the envelope; 0: none.",
             lo=0.0, hi=1.0, hi_open=True),
        _Key("mass_resolution", "float", 0.0,
             "Relative uncertainty of the mass resolution (the signal width sigma(m)(1 + "
             "delta)), profiled like `mass_scale`; 0: none.", lo=0.0, hi=1.0, hi_open=True),
        _Key("constraint", "choice", "gaussian",
             "Constraint of the mass-scale and resolution nuisance parameters.",
             choices=("gaussian", "lognormal")),
        _Key("toy_constraints", "choice", "fixed",
             "Background-only toys keep the constraints' centres at their nominal values "
             "(`fixed`, conditional ensemble) or draw them per toy (`sampled`, unconditional).",
             choices=("fixed", "sampled")),
        _Key("background_families", "strings", [],
             "Candidate background functions: families (`powersum`, `exppoly`, `bernstein`, "
             "`dijet`, each with its default orders) or single orders (`exppoly2`, "
             "`bernstein4`). Empty: the one function of `model.background`."),
        _Key("order_test_size", "float", 0.05,
             "Threshold of the likelihood-ratio test between consecutive orders of a family "
             "(its nominal size): the next order is taken when its p-value is below.",
             lo=0.0, hi=1.0, lo_open=True, hi_open=True),
        _Key("envelope", "bool", True,
             "Profile the choice of function as a discrete nuisance parameter (the envelope "
             "of the kept orders, Dauncey et al. 2015) for the scan and the global "
             "significance; `false` scans with the best kept function only."),
        _Key("penalty", "float", 1.0,
             "The envelope's penalty per free parameter, in -2 ln L.", lo=0.0),
        _Key("template", "str", "",
             "High-statistics background template for the spurious-signal test: a histogram "
             "saved by peaksift (`spectrum.json` layout, same bins); empty: no test."),
        _Key("spurious_limit", "float", 0.2,
             "Largest accepted spurious signal, as a fraction of the statistical error of "
             "the signal yield (common practice 0.2); candidates above it are flagged.",
             lo=0.0, lo_open=True),
        _Key("spurious_uncertainty", "bool", False,
             "Add each candidate's largest spurious signal (needs `template`) to the "
             "statistical error of the signal yield in quadrature (Z / sqrt(1 + r^2), r the "
             "spurious signal over the statistical error) in the scan, the envelope and "
             "their toys (not in the limits)."),
        _Key("toy_limits", "bool", False,
             "Where the plain limits use toys (few background events under the signal, or "
             "`limits.method = \"toys\"`), compute the limits with systematics with toys too, "
             "every nuisance and the background choice profiled on each toy (costly: about "
             "0.1-0.25 s CPU per toy and mass with shape factors and an envelope); false: "
             "those masses keep asymptotic limits with systematics and a note says so."),
        _Key("sqrt_s", "float", None,
             "Centre-of-mass energy (GeV) of the dijet family; default twice the window's "
             "upper edge.", lo=0.0, lo_open=True, nullable=True),
    ),
    "calibration": (
        _Key("particle", "str", "",
             "Known particle (particle-data table name, e.g. `Z0`) whose peak is fitted as a "
             "calibration check; empty: no calibration fit."),
        _Key("window", "window", None, "Calibration fit window `[low, high]`, GeV.",
             nullable=True),
        _Key("bins", "int", 80, "Bins on the calibration window.", lo=1, hi=100000),
        _Key("signal", "str", "voigt", "Signal shape of the calibration fit."),
        _Key("background", "str", "exponential", "Background shape of the calibration fit."),
        _Key("signal_options", "table", {}, "Options passed to the calibration signal shape."),
        _Key("background_options", "table", {},
             "Options passed to the calibration background shape."),
        _Key("fix_width", "bool", True,
             "Fix the natural width to the tabulated value (fit mass and resolution only)."),
    ),
    "signal_model": (
        _Key("files", "strings", [],
             "Simulated signal samples, one file (or glob) per generated mass, in the order "
             "of `masses`; the search's own selection and pairing run on each. Empty: no "
             "signal model from samples."),
        _Key("masses", "floats", [],
             "Generated mass (GeV) of each sample in `files` (or give `mass_column`)."),
        _Key("mass_column", "str", "",
             "A per-event column of the samples holding the generated (true) mass in GeV; "
             "each sample's mass is then the median of that column over its events, and "
             "`masses` is left out. Empty: the masses come from `masses`."),
        _Key("generated", "floats", [],
             "Number of generated events (or sum of generator weights) of each sample."),
        _Key("shape", "str", "crystalball",
             "Signal shape fitted to every sample (default: the double-sided Crystal Ball)."),
        _Key("order", "int", 1, "Polynomial order in mass of every shape parameter.",
             lo=0, hi=5),
        _Key("efficiency_order", "int", 2,
             "Polynomial order in mass of the efficiency x acceptance.", lo=0, hi=5),
        _Key("raise_order", "bool", False,
             "Take `order` and `efficiency_order` as the lowest orders and raise each "
             "quantity's order while its polynomial does not describe the samples (chi2 "
             "p-value below 0.05), up to the number of samples - 2; precise samples resolve "
             "curvature a low order misses."),
        _Key("fix", "values", {},
             "Shape parameters held at a value in every sample fit, e.g. "
             "`{ n_high = 10.0 }` for a tail the samples do not determine."),
        _Key("saved", "str", "",
             "A previous results.json whose `signal_model` is reused instead of samples "
             "(relative to the config file)."),
    ),
    "execution": (
        _Key("engine", "choice", "serial",
             "Where the per-chunk work runs: in this process, a local process pool, or Dask.",
             choices=("serial", "processes", "dask")),
        _Key("workers", "int", None,
             "Worker processes (`processes`) or local Dask workers; default: CPU count.",
             lo=1, hi=4096, nullable=True),
        _Key("address", "str", "",
             "Dask scheduler address (e.g. `tcp://scheduler.example:8786`); empty starts a "
             "local cluster."),
        _Key("chunk_events", "int", 250_000, "Events per chunk (bounds memory).",
             lo=1, hi=1_000_000_000),
        _Key("unreadable_files", "choice", "stop",
             "What an input file that cannot be read does to the run: `stop` it (the error "
             "names the file) or is `left_out` (listed in results.json and the report).",
             choices=UNREADABLE_FILES),
        _Key("start_method", "choice", "auto",
             "How local worker processes start: `auto` (fork on Linux, else spawn), `fork` "
             "(ready at once, from this process) or `spawn` (fresh interpreters; use it if "
             "code in the calling process is not fork-safe).",
             choices=("auto", "fork", "spawn")),
    ),
    "run": (
        _Key("name", "str", "",
             "Name of the data-taking run or data set, shown first in every figure's run "
             "label (e.g. `demo run`); empty for none."),
        _Key("sqrt_s", "float", None,
             "Centre-of-mass energy in TeV for the run label; the label's integrated "
             "luminosity is `limits.luminosity`.", lo=0.0, lo_open=True, nullable=True),
        _Key("channel", "str", "",
             "Final state in the run label, matplotlib mathtext allowed (e.g. "
             "`$\\mu^+\\mu^-$`); empty: written from the collections and the pairing's "
             "charge."),
    ),
    "output": (
        _Key("dir", "str", "peaksift_out",
             "Output directory (relative to the config file); `--out` overrides it."),
        _Key("formats", "strings", ["png"],
             "Figure formats. PNG is always written (the reports embed it); add `\"pdf\"` "
             "(or `\"svg\"`) for a paper: each adds about a third to the figures' drawing "
             "time.",
             choices=("png", "pdf", "svg")),
        _Key("figures", "strings", ["all"],
             "Which figures to draw: `\"all\"`, `\"none\"`, or a list of "
             + ", ".join(f"`{f}`" for f in FIGURES) + " (a figure is drawn only when the run "
             "has its results; the report shows the ones drawn; `peaksift spectrum` draws its "
             "`spectrum` and `candidates`). Fewer figures, a faster run.",
             choices=("all", "none", *FIGURES)),
        _Key("log_scale", "bool", False, "Draw the spectrum with a logarithmic y axis."),
        _Key("title", "str", "", "Report title (default: names the searched pair)."),
    ),
}

_TOP = tuple(SCHEMA)
