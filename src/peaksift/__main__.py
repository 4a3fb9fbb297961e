"""``python -m peaksift``: the same command as ``peaksift``."""

from .cli import run

run()
