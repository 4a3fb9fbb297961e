"""DESIGN.md's import direction, enforced on the source text of every module.

Two rules (../shared/DESIGN.md, "Data flow: one direction"):

1. A module imports only from its own layer or a lower one (earlier rows of ``LAYERS``).
2. A module never imports a private ``_name`` -- a private module or a private symbol -- of
   another *package*.  A package here is a top-level entry under ``src/peaksift/``: a
   subpackage (``shapes/``, ``stats/``, ``execution/``, ...) or a single module
   (``cuts.py``, ``pairing.py``, ...).  Inside one package, private modules and names are
   shared freely (``stats/limits.py`` may use ``stats/scan.py``'s ``_prepare_model``).
   The top-level private modules of the base layer (``_files.py``, ``_style.py``,
   ``_processes.py``) are the base layer's shared helpers: private to peaksift's users, but
   any package may import their public names (never their ``_names``).  Any other helper
   that two packages need is made public where its concept lives.

Every import statement counts, at module level or inside a function, and so does an
attribute access ``mod._name`` on a peaksift module bound by an import.  The lazy re-exports
of ``peaksift/__init__.py`` are resolved through its ``_EXPORTS`` table, so ``from peaksift
import fit`` counts as an import of ``peaksift.fitting``.

``LAYERS`` below is the one place that maps modules to layers; a module missing from it
fails the test, so a new module is placed on purpose.
"""

from __future__ import annotations

import ast
import pathlib
from dataclasses import dataclass

SRC = pathlib.Path(__file__).resolve().parents[1] / "src" / "peaksift"

# DESIGN.md's layer table, lowest first; names are the top-level entries of src/peaksift/
# ("__init__" is the package facade: it imports only errors, and its lazy re-exports are
# resolved name by name).  likelihood/, fitting/, blinding.py and energy_loss.py are listed
# before they all exist so that they land in their layer when they are written.
LAYERS: tuple[tuple[str, frozenset[str]], ...] = (
    ("base", frozenset({"__init__", "errors", "_files", "_style", "_processes", "_format",
                        "_json", "_values", "_vocabulary", "_output", "_progress", "_jit",
                        "_value_table", "_collector", "_lean_imports", "_png", "_kept", "_stall",
                        "_annotations"})),
    # resonances.py sits here, not in DESIGN's top row: it is the particle-data table (masses
    # and widths of known particles) that config, identification and pairing all read, and it
    # imports only errors and the `particle` package (DEVELOPERS.md, "Layers").
    ("input", frozenset({"events", "kinematics", "energy_loss", "resonances"})),
    ("candidates", frozenset({"cuts", "pairing", "candidates_io", "histogram", "blinding"})),
    ("models", frozenset({"shapes", "resolution", "likelihood", "fitting"})),
    ("statistics", frozenset({"stats"})),
    ("pipeline", frozenset({"config", "execution"})),
    ("orchestration and output",
     frozenset({"search", "plotting", "plotting_dedx", "report", "report_sections", "report_background",
                "report_fits", "report_limits", "report_selection",
                "simulate",
                "simulate_tracks", "cli", "__main__"})),
)
BASE_HELPERS = frozenset({"_files", "_style", "_processes", "_format", "_json", "_values",
                          "_vocabulary", "_output", "_progress", "_jit", "_value_table",
                          "_collector", "_lean_imports", "_png", "_kept", "_stall",
                          "_annotations"})

# Violations still in the code, each to be deleted by whoever fixes it (a fixed entry that
# stays here fails test_allow_list_has_no_fixed_entries).  Key: (importing module, what).
ALLOWED: dict[tuple[str, str], str] = {}


def layer_of(module: str) -> int | None:
    """Index in LAYERS of a dotted module name under peaksift (None when unmapped)."""
    parts = module.split(".")
    top = parts[1] if len(parts) > 1 else "__init__"
    for i, (_, names) in enumerate(LAYERS):
        if top in names:
            return i
    return None


def _package(module: str) -> str:
    parts = module.split(".")
    return parts[1] if len(parts) > 1 else "__init__"


def _private(name: str) -> bool:
    return name.startswith("_") and not (name.startswith("__") and name.endswith("__"))


def _is_module(module: str) -> bool:
    """Whether ``peaksift.a.b`` names a module or package (existing or in LAYERS)."""
    rel = pathlib.Path(*module.split(".")[1:])
    if not rel.parts:
        return True
    if len(rel.parts) == 1 and layer_of(module) is not None:
        return True
    return (SRC / rel).with_suffix(".py").is_file() or (SRC / rel / "__init__.py").is_file()


def _exports() -> dict[str, str]:
    """The facade's lazy re-exports (name -> defining module), read from its source."""
    tree = ast.parse((SRC / "__init__.py").read_text(encoding="utf-8"))
    for node in tree.body:
        if (isinstance(node, ast.AnnAssign) and isinstance(node.target, ast.Name)
                and node.target.id == "_EXPORTS"):
            return ast.literal_eval(node.value)
    raise AssertionError("peaksift/__init__.py has no _EXPORTS table")


@dataclass(frozen=True)
class Violation:
    module: str
    line: int
    what: str

    def __str__(self) -> str:
        return f"{self.module}:{self.line}: {self.what}"


def violations(module: str, source: str, *, is_package: bool = False,
               exports: dict[str, str] | None = None) -> list[Violation]:
    """Every breach of the two rules in one module's source text.

    ``module`` is its dotted name (``peaksift.stats.scan``); ``is_package`` says whether the
    source is a package's ``__init__.py`` (for relative imports).
    """
    exports = _exports() if exports is None else exports
    here = layer_of(module)
    if here is None:
        return [Violation(module, 0, f"module not in LAYERS: add {_package(module)!r} to "
                                     "its layer in tests/test_layers.py (and DESIGN.md)")]
    own = _package(module)
    anchor = module.split(".") if is_package else module.split(".")[:-1]
    out: list[Violation] = []
    bound: dict[str, str] = {}  # local name -> peaksift module it refers to

    def check(target: str, name: str | None, line: int) -> None:
        # target: the peaksift module imported from; name: the symbol taken (None: module)
        if name is not None and target == "peaksift":
            target, name = (f"peaksift.{name}", None) if _is_module(f"peaksift.{name}") \
                else (exports.get(name, "peaksift"), name)
        elif name is not None and _is_module(f"{target}.{name}"):
            target, name = f"{target}.{name}", None
        there = layer_of(target)
        if there is None:
            out.append(Violation(module, line, f"imports {target}, which is not in LAYERS"))
        elif there > here:
            out.append(Violation(module, line, f"imports {target} ({LAYERS[there][0]}) from "
                                               f"{LAYERS[here][0]}"))
        if _package(target) == own:
            return
        parts = target.split(".")[1:]
        if parts and parts[0] in BASE_HELPERS:
            parts = parts[1:]
        if any(_private(p) for p in parts):
            out.append(Violation(module, line, f"private module {target}"))
        if name is not None and _private(name):
            out.append(Violation(module, line, f"private name {target}.{name}"))

    tree = ast.parse(source)
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            for alias in node.names:
                if alias.name == "peaksift" or alias.name.startswith("peaksift."):
                    check(alias.name, None, node.lineno)
                    local = alias.asname or alias.name.split(".")[0]
                    bound[local] = alias.name if alias.asname else "peaksift"
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = anchor[: len(anchor) - node.level + 1]
                target = ".".join(base + ([node.module] if node.module else []))
            else:
                target = node.module or ""
            if not (target == "peaksift" or target.startswith("peaksift.")):
                continue
            for alias in node.names:
                check(target, alias.name, node.lineno)
                if _is_module(f"{target}.{alias.name}"):
                    bound[alias.asname or alias.name] = f"{target}.{alias.name}"
    # ``from peaksift import pairing`` then ``pairing._load(...)`` reaches a private name too
    for node in ast.walk(tree):
        if (isinstance(node, ast.Attribute) and isinstance(node.value, ast.Name)
                and node.value.id in bound and _private(node.attr)
                and _package(bound[node.value.id]) != own):
            out.append(Violation(module, node.lineno,
                                 f"private name {bound[node.value.id]}.{node.attr}"))
    return out


def _all_modules() -> list[tuple[str, pathlib.Path]]:
    out = []
    for path in sorted(SRC.rglob("*.py")):
        parts = ("peaksift",) + path.relative_to(SRC).with_suffix("").parts
        if parts[-1] == "__init__":
            parts = parts[:-1]
        out.append((".".join(parts), path))
    return out


def _found() -> list[Violation]:
    exports = _exports()
    found = []
    for module, path in _all_modules():
        found += violations(module, path.read_text(encoding="utf-8"),
                            is_package=path.name == "__init__.py", exports=exports)
    return found


def test_every_module_is_in_a_layer():
    unmapped = [m for m, _ in _all_modules() if layer_of(m) is None]
    assert unmapped == [], f"add these to LAYERS (and DESIGN.md's table): {unmapped}"


def test_imports_follow_the_layers_and_leave_private_names_alone():
    bad = [v for v in _found() if (v.module, v.what) not in ALLOWED]
    assert bad == [], "\n".join(map(str, bad))


def test_allow_list_has_no_fixed_entries():
    present = {(v.module, v.what) for v in _found()}
    fixed = [key for key in ALLOWED if key not in present]
    assert fixed == [], f"fixed, so delete from ALLOWED in tests/test_layers.py: {fixed}"


# The checker must be able to fail: fake modules that break each rule once.
def _whats(module: str, source: str, **kw) -> list[str]:
    return [v.what for v in violations(module, source, exports={"fit": "peaksift.fitting"},
                                       **kw)]


def test_checker_catches_an_upward_import_inside_a_function():
    src = "def f():\n    from peaksift.search import run_search\n    return run_search\n"
    assert _whats("peaksift.kinematics", src) == [
        "imports peaksift.search (orchestration and output) from input"]


def test_checker_resolves_relative_and_facade_imports():
    assert _whats("peaksift.stats.scan", "from ..config import load_config\n") == [
        "imports peaksift.config (pipeline) from statistics"]
    assert _whats("peaksift.shapes", "from .. import fit\n", is_package=True) == []
    assert _whats("peaksift.cuts", "from peaksift import fit\n") == [
        "imports peaksift.fitting (models) from candidates"]
    assert _whats("peaksift.cuts", "import peaksift.stats.scan as s\n") == [
        "imports peaksift.stats.scan (statistics) from candidates"]
    assert _whats("peaksift.search", "from peaksift import __version__, errors\n") == []


def test_checker_catches_private_names_of_another_package():
    assert _whats("peaksift.search", "from .stats.scan import _clean\n") == [
        "private name peaksift.stats.scan._clean"]
    assert _whats("peaksift.search", "from peaksift.execution import _chunk\n") == [
        "private module peaksift.execution._chunk"]
    assert _whats("peaksift.stats.scan", "from peaksift.shapes._base import Shape\n") == [
        "private module peaksift.shapes._base"]
    assert _whats("peaksift.execution._chunk",
                  "from .. import pairing\npairing._count_pairs()\n") == [
        "private name peaksift.pairing._count_pairs"]
    assert _whats("peaksift.histogram", "from peaksift._files import _tmp\n") == [
        "private name peaksift._files._tmp"]


def test_checker_allows_own_package_privates_and_base_helpers():
    assert _whats("peaksift.stats.limits", "from .scan import _clean, _prepare_model\n") == []
    assert _whats("peaksift.execution", "from peaksift.execution._chunk import Selection\n",
                  is_package=True) == []
    assert _whats("peaksift.histogram", "from peaksift._files import atomic_write\n") == []


def test_checker_flags_modules_missing_from_the_table():
    assert _whats("peaksift.newthing", "x = 1\n")[0].startswith("module not in LAYERS")
