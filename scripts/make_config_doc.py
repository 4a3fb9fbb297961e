"""Regenerate the key reference in docs/config.md from the config schema.

The reference between the ``<!-- reference:start -->`` and ``<!-- reference:end -->``
markers is :func:`peaksift.config.reference_markdown` (one table per section, from
``config.SCHEMA``); the text around it is written by hand.  ``tests/test_config.py`` fails
when the page is stale.

    python scripts/make_config_doc.py           # rewrite docs/config.md
    python scripts/make_config_doc.py --check   # exit 1 if it is stale
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from peaksift.config import reference_markdown

PAGE = Path(__file__).resolve().parents[1] / "docs" / "config.md"
START, END = "<!-- reference:start -->\n", "<!-- reference:end -->"


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--check", action="store_true", help="only report whether it is stale")
    args = ap.parse_args()
    text = PAGE.read_text(encoding="utf-8")
    head, rest = text[: text.index(START) + len(START)], text[text.index(START) + len(START):]
    new = head + reference_markdown() + rest[rest.index(END):]
    if new == text:
        print(f"{PAGE} is up to date")
        return 0
    if args.check:
        print(f"{PAGE} is stale: run python scripts/make_config_doc.py")
        return 1
    PAGE.write_text(new, encoding="utf-8")
    print(f"{PAGE} regenerated")
    return 0


if __name__ == "__main__":
    sys.exit(main())
