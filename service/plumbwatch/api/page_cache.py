"""An in-process cache of what the pages derive from stored records and sketches.

Evaluation records never change once their run has committed, and the sketches
of a window only change with the next run, so everything derived from them is
keyed by the evaluation id it belongs to and never needs invalidating: a new run
has a new id. The cache only bounds memory (least recently used go first).
"""

from __future__ import annotations

import threading
from collections import OrderedDict
from collections.abc import Callable, Hashable
from typing import Any, TypeVar

T = TypeVar("T")
_MISSING = object()


class PageCache:
    def __init__(self, max_items: int = 4096) -> None:
        self._items: OrderedDict[Hashable, Any] = OrderedDict()
        self._lock = threading.Lock()
        self.max_items = max_items
        self.hits = 0
        self.misses = 0

    def get(self, key: Hashable, default: Any = None) -> Any:
        with self._lock:
            if key in self._items:
                self._items.move_to_end(key)
                self.hits += 1
                return self._items[key]
            self.misses += 1
            return default

    def put(self, key: Hashable, value: Any) -> None:
        with self._lock:
            self._items[key] = value
            self._items.move_to_end(key)
            while len(self._items) > self.max_items:
                self._items.popitem(last=False)

    def get_or_compute(self, key: Hashable, compute: Callable[[], T]) -> T:
        found = self.get(key, _MISSING)
        if found is not _MISSING:
            return found
        value = compute()
        self.put(key, value)
        return value

    def clear(self) -> None:
        with self._lock:
            self._items.clear()
