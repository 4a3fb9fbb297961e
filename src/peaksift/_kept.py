"""Work kept by its inputs between calls: a small thread-safe store, newest last (base layer).

:class:`Kept` -- ``get(key, default)`` and ``put(key, value)`` on an ordered dict under a
lock, the oldest entry dropped beyond ``size``.  For arrays and tables that depend on a
binning or a window but not on the counts, so that the next fit of the same binning (toys,
a refit) skips them.  A kept value is shared: its users only read it.
"""

from __future__ import annotations

import threading
from collections import OrderedDict
from collections.abc import Hashable
from typing import Any

__all__ = ["Kept"]


class Kept:
    """At most ``size`` values by key; a hit becomes the newest."""

    def __init__(self, size: int) -> None:
        self.size = size
        self._values: OrderedDict[Hashable, Any] = OrderedDict()
        self._lock = threading.Lock()

    def get(self, key: Hashable, default: Any = None) -> Any:
        with self._lock:
            value = self._values.get(key, default)
            if key in self._values:
                self._values.move_to_end(key)
            return value

    def put(self, key: Hashable, value: Any) -> Any:
        """Keep ``value`` (returned) under ``key``, dropping the oldest beyond ``size``."""
        with self._lock:
            self._values[key] = value
            while len(self._values) > self.size:
                self._values.popitem(last=False)
        return value
