"""``python -m peaksift``: the same command as ``peaksift``."""

import sys

from .cli import main

sys.exit(main())
