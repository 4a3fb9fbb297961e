"""The configuration reference page, generated from the schema."""

from __future__ import annotations

from .schema import _REQUIRED, SCHEMA, _Key
from .values import _constraint_kinds, _range_text


# ---------------------------------------------------------------------------- reference
def _default_text(key: _Key) -> str:
    d = key.default
    if d is _REQUIRED:
        return "required"
    if d is None:
        return "unset"
    if isinstance(d, bool):
        return "true" if d else "false"
    if isinstance(d, str):
        return f'"{d}"'
    if isinstance(d, list):
        return "[" + ", ".join(f'"{x}"' for x in d) + "]"
    if isinstance(d, dict):
        return "{}"
    return str(d)


def _allowed_text(key: _Key) -> str:
    if key.choices:
        return ", ".join(f'"{c}"' for c in key.choices)
    rng = _range_text(key)
    kinds = {"str": "string", "int": "integer", "float": "number", "bool": "true/false",
             "window": "[low, high] GeV", "paths": "string or list of strings",
             "strings": "list of strings", "floats": "list of numbers", "table": "table",
             "pairs": "[[mass, sigma], ...]", "values": "table of numbers",
             "ranges": "table of [low, high]", "constraints": "table of constraints"}
    base = kinds.get(key.kind, key.kind)
    return base + (f", {rng}" if rng else "")


def reference_markdown() -> str:
    """The key reference (one table per section) that ``docs/config.md`` embeds."""
    lines: list[str] = []
    for sec, keys in SCHEMA.items():
        lines.append(f"### [{sec}]")
        lines.append("")
        lines.append("| key | default | allowed | meaning |")
        lines.append("|---|---|---|---|")
        for k in keys:
            doc = k.doc.replace("{constraint_kinds}", ", ".join(
                f"`{c}`" for c in _constraint_kinds())).replace("|", "\\|")
            lines.append(f"| `{sec}.{k.name}` | `{_default_text(k)}` | {_allowed_text(k)} | {doc} |")
        lines.append("")
    return "\n".join(lines)
