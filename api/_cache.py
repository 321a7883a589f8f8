"""A small thread-safe LRU of response bodies, bounded in entries and in bytes.

Keys are canonical requests (the endpoint and the canonical JSON of the
validated, defaulted request), so ``"tanh"`` and ``{"name": "tanh"}`` share an
entry. One cache per app (and so per gunicorn worker process).
"""

from __future__ import annotations

import threading
from collections import OrderedDict
from collections.abc import Hashable
from dataclasses import dataclass
from typing import Any, Generic, TypeVar

__all__ = ["LRUCache", "CacheStats"]

V = TypeVar("V")


@dataclass(frozen=True)
class CacheStats:
    """Counters of an :class:`LRUCache`."""

    entries: int
    bytes: int
    hits: int
    misses: int

    def to_dict(self) -> dict[str, Any]:
        return {"entries": self.entries, "bytes": self.bytes, "hits": self.hits,
                "misses": self.misses}


class LRUCache(Generic[V]):
    """Least-recently-used mapping with a limit on entries and on total size.

    Parameters
    ----------
    max_entries : int
        0 disables the cache.
    max_bytes : int, optional
        Limit on the sum of ``size(value)``; an entry larger than this is not stored.
    size : callable, optional
        Size of a value in bytes (default ``len``).
    """

    def __init__(self, max_entries: int, max_bytes: int | None = None, size: Any = len) -> None:
        self.max_entries = max_entries
        self.max_bytes = max_bytes
        self._size = size
        self._data: OrderedDict[Hashable, V] = OrderedDict()
        self._bytes = 0
        self._hits = 0
        self._misses = 0
        self._lock = threading.Lock()

    def get(self, key: Hashable) -> V | None:
        """The value, marked most recently used; None when absent."""
        with self._lock:
            try:
                value = self._data[key]
            except KeyError:
                self._misses += 1
                return None
            self._data.move_to_end(key)
            self._hits += 1
            return value

    def put(self, key: Hashable, value: V) -> None:
        """Store ``value``, evicting the least recently used entries to fit."""
        if self.max_entries <= 0:
            return
        size = self._size(value) if self.max_bytes is not None else 0
        if self.max_bytes is not None and size > self.max_bytes:
            return
        with self._lock:
            old = self._data.pop(key, None)
            if old is not None:
                self._bytes -= self._size(old) if self.max_bytes is not None else 0
            self._data[key] = value
            self._bytes += size
            while len(self._data) > self.max_entries or (
                    self.max_bytes is not None and self._bytes > self.max_bytes):
                _, evicted = self._data.popitem(last=False)
                self._bytes -= self._size(evicted) if self.max_bytes is not None else 0

    def clear(self) -> None:
        """Drop every entry (the counters stay)."""
        with self._lock:
            self._data.clear()
            self._bytes = 0

    def stats(self) -> CacheStats:
        """Entries, bytes, hits and misses so far."""
        with self._lock:
            return CacheStats(len(self._data), self._bytes, self._hits, self._misses)

    def __len__(self) -> int:
        return len(self._data)
