"""``python -m peaksift.cli``: the same command as ``peaksift``."""

from . import run

run()
