"""A cache of the dashboard's responses, valid until the store changes.

Every page shows what the store holds, and the store changes only when an ingest, an update or
an ``alerts send`` writes to it. :class:`ResponseCache` keeps the outputs of the page
callbacks keyed by their inputs and by the store's fingerprint
(:meth:`monitor.data.store.Store.data_version`, one cheap query per request): a desk of
analysts opening the same Board after the morning update computes it once. A write to the
store changes the fingerprint, so no page shows anything staler than the store.
"""

from __future__ import annotations

import threading
from collections import OrderedDict
from collections.abc import Callable
from typing import Any

#: Responses kept (the least recently used go first).
CACHE_SIZE = 128


class ResponseCache:
    """Outputs of page callbacks by (callback, inputs, store fingerprint).

    Parameters
    ----------
    store : monitor.data.store.Store
    size : int
        Responses kept.
    """

    def __init__(self, store, size: int = CACHE_SIZE):
        self.store = store
        self.size = size
        self._items: OrderedDict[tuple, Any] = OrderedDict()
        self._lock = threading.Lock()
        self.hits = self.misses = 0

    def __call__(self, name: str, compute: Callable[..., Any], *inputs: Any) -> Any:
        """``compute(*inputs)``, or the stored response for the same inputs and store."""
        key = (name, _frozen(inputs), self.store.data_version())
        with self._lock:
            if key in self._items:
                self._items.move_to_end(key)
                self.hits += 1
                return self._items[key]
        value = compute(*inputs)
        with self._lock:
            self.misses += 1
            self._items[key] = value
            while len(self._items) > self.size:
                self._items.popitem(last=False)
        return value


def _frozen(value: Any) -> Any:
    """A hashable form of callback inputs (lists and dicts from the browser)."""
    if isinstance(value, dict):
        return tuple(sorted((k, _frozen(v)) for k, v in value.items()))
    if isinstance(value, list | tuple):
        return tuple(_frozen(v) for v in value)
    return value
