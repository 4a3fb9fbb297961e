"""The public surface: every lazily exported name resolves and is listed in ``__all__``."""

import peaksift


def test_every_export_resolves_and_is_listed():
    for name, module in peaksift._EXPORTS.items():
        assert name in peaksift.__all__, name
        obj = getattr(peaksift, name)
        assert obj.__module__.startswith("peaksift"), (name, module)


def test_unknown_attribute_is_an_attribute_error():
    try:
        peaksift.no_such_thing  # noqa: B018
    except AttributeError as exc:
        assert "no_such_thing" in str(exc)
    else:  # pragma: no cover
        raise AssertionError("expected AttributeError")
