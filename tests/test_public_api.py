"""The public surface: DESIGN.md's core objects are exported, every lazy export resolves."""

import peaksift

# The core objects and entry points named in DESIGN.md and the issues (common practice:
# a small public surface re-exported from the package).
DESIGN_NAMES = [
    "read_events", "iter_events", "describe", "pair", "Candidates", "MassHistogram", "fit",
    "FitResult", "scan", "ScanResult", "upper_limits", "LimitResult", "run_search",
    "SearchResult", "PeaksiftError", "InputError", "ConfigError", "CutError", "FitError",
    "ExecutionError", "kinematics", "shapes", "stats", "cuts",
]


def test_design_names_are_public():
    missing = [n for n in DESIGN_NAMES if n not in peaksift.__all__]
    assert missing == []
    for n in DESIGN_NAMES:
        assert getattr(peaksift, n) is not None


def test_every_export_resolves_and_is_listed():
    for name, module in peaksift._EXPORTS.items():
        assert name in peaksift.__all__, name
        obj = getattr(peaksift, name)
        assert obj.__module__ == module, (name, obj.__module__, module)


def test_error_classes_share_one_base():
    for n in ["InputError", "ConfigError", "CutError", "FitError", "ExecutionError"]:
        assert issubclass(getattr(peaksift, n), peaksift.PeaksiftError)


def test_unknown_attribute_is_an_attribute_error():
    try:
        peaksift.no_such_thing  # noqa: B018
    except AttributeError as exc:
        assert "no_such_thing" in str(exc)
    else:  # pragma: no cover
        raise AssertionError("expected AttributeError")
