"""Every cache the engine keeps, each a bounded object with a public ``clear()``, in one registry.

The engine caches what is expensive and exactly reusable: quadrature nodes per
(mean, q, breakpoints, rule), Legendre and Hermite tables, Hermite coefficients
per (activation, q), compiled activations. Each such cache is an object that
owns its storage, is bounded, reports its size with ``len()`` and empties with
``clear()``, and is registered here under a dotted name when its module is
imported. :func:`clear_caches` empties all of them (benchmarks that time a first
call, long-running services, tests); :func:`caches` lists them.

Two kinds of cache object:

* :class:`BoundedCache`, a least-recently-used mapping (thread-safe), for caches
  that a module fills by hand;
* :func:`cached`, a decorator that memoises a function with
  :func:`functools.lru_cache` (C speed on the hot paths of the quadrature) and
  registers a :class:`FunctionCache` wrapper of it.
"""

from __future__ import annotations

import functools
import threading
from collections import OrderedDict
from collections.abc import Callable, Hashable
from typing import Any, Protocol, TypeVar

from .errors import InvalidParameterError

__all__ = ["Clearable", "BoundedCache", "FunctionCache", "cached", "register", "caches",
           "clear_caches"]

F = TypeVar("F", bound=Callable[..., Any])


class Clearable(Protocol):
    """What the registry needs of a cache: a name, a bound, a size and ``clear()``."""

    name: str
    maxsize: int

    def clear(self) -> None: ...

    def __len__(self) -> int: ...


_REGISTRY: dict[str, Clearable] = {}
_LOCK = threading.Lock()


def register(cache: Clearable) -> Clearable:
    """Add ``cache`` to the registry under ``cache.name`` (a name registers once).

    Raises
    ------
    InvalidParameterError
        If another cache already holds that name, or the cache is unbounded.
    """
    if not isinstance(cache.maxsize, int) or cache.maxsize < 1:
        raise InvalidParameterError("maxsize", "an integer >= 1 (every cache is bounded)",
                                    cache.maxsize)
    with _LOCK:
        known = _REGISTRY.get(cache.name)
        if known is not None and known is not cache:
            raise InvalidParameterError("name", "a name no other cache has", cache.name)
        _REGISTRY[cache.name] = cache
    return cache


def caches() -> dict[str, Clearable]:
    """The registered caches by name (a copy of the registry)."""
    with _LOCK:
        return dict(_REGISTRY)


def clear_caches() -> None:
    """Empty every registered cache of the engine.

    Results computed afterwards are the same (every cache is keyed exactly);
    only their time changes.
    """
    for cache in caches().values():
        cache.clear()


class BoundedCache:
    """A least-recently-used mapping of at most ``maxsize`` entries, registered by name.

    Parameters
    ----------
    name : str
        Dotted name in the registry, e.g. ``"hermite.tables"``.
    maxsize : int
        The bound; the least recently used entry goes first.
    """

    def __init__(self, name: str, maxsize: int) -> None:
        self.name = name
        self.maxsize = maxsize
        self._data: OrderedDict[Hashable, Any] = OrderedDict()
        self._lock = threading.Lock()
        register(self)

    def get(self, key: Hashable, default: Any = None) -> Any:
        """The value stored under ``key`` (marked as recently used), or ``default``."""
        with self._lock:
            try:
                value = self._data[key]
            except KeyError:
                return default
            self._data.move_to_end(key)
            return value

    def put(self, key: Hashable, value: Any) -> Any:
        """Store ``value`` under ``key``, dropping the least recently used beyond the bound."""
        with self._lock:
            self._data[key] = value
            self._data.move_to_end(key)
            while len(self._data) > self.maxsize:
                self._data.popitem(last=False)
        return value

    def clear(self) -> None:
        """Forget every entry."""
        with self._lock:
            self._data.clear()

    def __len__(self) -> int:
        return len(self._data)

    def __repr__(self) -> str:
        return f"BoundedCache({self.name!r}, {len(self)}/{self.maxsize})"


class FunctionCache:
    """The registry's view of a function memoised by :func:`functools.lru_cache`."""

    def __init__(self, name: str, function: Any, maxsize: int) -> None:
        self.name = name
        self.maxsize = maxsize
        self._function = function

    def clear(self) -> None:
        """Forget every memoised call."""
        self._function.cache_clear()

    def __len__(self) -> int:
        return int(self._function.cache_info().currsize)

    def __repr__(self) -> str:
        return f"FunctionCache({self.name!r}, {len(self)}/{self.maxsize})"


def cached(name: str, maxsize: int) -> Callable[[F], F]:
    """Memoise a function (arguments hashable, results treated as read-only) and register it.

    The function keeps ``cache_clear`` and ``cache_info`` of
    :func:`functools.lru_cache` and gains ``cache``, its registered
    :class:`FunctionCache`.
    """
    def decorate(function: F) -> F:
        wrapped = functools.lru_cache(maxsize=maxsize)(function)
        wrapped.cache = register(FunctionCache(name, wrapped, maxsize))  # type: ignore[attr-defined]
        return wrapped  # type: ignore[return-value]

    return decorate
