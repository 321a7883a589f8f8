"""Bounded, thread-safe caches of built activations.

Activations compare by identity and the quadrature caches key on them, so building the same
activation twice should give the same object. A service that takes parameters and formulas from
anyone must not keep every distinct one forever, though: each cache here holds at most
``max_entries`` activations (and at most ``max_weight`` units of size, for formulas whose
compiled graphs differ in size), evicting the least recently used. While an activation is
cached, the same key returns the same object. Each cache joins the engine's registry
(:mod:`propcalc.caches`), so :func:`propcalc.clear_caches` empties them with the others.
"""

from __future__ import annotations

import threading
from collections import OrderedDict
from collections.abc import Callable, Hashable
from typing import Generic, TypeVar

from ..caches import register

__all__ = ["ActivationCache", "clear_activation_caches", "activation_caches"]

V = TypeVar("V")

_ALL: list["ActivationCache"] = []


class ActivationCache(Generic[V]):
    """A least-recently-used mapping with a bound on entries and on total weight.

    Parameters
    ----------
    name : str
        Dotted name in the engine's cache registry (:mod:`propcalc.caches`), e.g.
        ``"activations.builtins"``.
    max_entries : int
        Most entries kept.
    max_weight : int, optional
        Most total weight kept (the weight of an entry is given by ``weight``); unbounded
        when None. An entry heavier than the bound on its own is not kept.
    weight : callable, optional
        Weight of a value (1 for every value when absent).
    """

    def __init__(self, name: str, max_entries: int, max_weight: int | None = None,
                 weight: Callable[[V], int] | None = None) -> None:
        self.name = name
        self.max_entries = int(max_entries)
        self.max_weight = max_weight
        self._weight = weight or (lambda value: 1)
        self._data: OrderedDict[Hashable, tuple[V, int]] = OrderedDict()
        self._total = 0
        self._lock = threading.Lock()
        _ALL.append(self)
        register(self)  # propcalc.clear_caches() empties it too

    def get(self, key: Hashable) -> V | None:
        """The value kept under ``key`` (marked as recently used), or None."""
        with self._lock:
            entry = self._data.get(key)
            if entry is None:
                return None
            self._data.move_to_end(key)
            return entry[0]

    def put(self, key: Hashable, value: V) -> V:
        """Keep ``value`` under ``key`` unless a value is already there; return the kept one.

        The first value stored under a key wins, so concurrent builders of the same key all
        end up with one object.
        """
        w = int(self._weight(value))
        with self._lock:
            entry = self._data.get(key)
            if entry is not None:
                self._data.move_to_end(key)
                return entry[0]
            if self.max_weight is not None and w > self.max_weight:
                return value
            self._data[key] = (value, w)
            self._total += w
            while self._data and (len(self._data) > self.max_entries or (
                    self.max_weight is not None and self._total > self.max_weight)):
                _, (_, w_old) = self._data.popitem(last=False)
                self._total -= w_old
            return value

    def clear(self) -> None:
        """Forget every entry."""
        with self._lock:
            self._data.clear()
            self._total = 0

    def __len__(self) -> int:
        return len(self._data)

    @property
    def maxsize(self) -> int:
        """The bound on entries (the name the engine's cache registry reads)."""
        return self.max_entries

    @maxsize.setter
    def maxsize(self, value: int) -> None:
        self.max_entries = int(value)

    def __repr__(self) -> str:
        return f"ActivationCache({self.name!r}, {len(self)}/{self.max_entries})"

    @property
    def total_weight(self) -> int:
        """Sum of the weights of the entries kept."""
        return self._total


def activation_caches() -> tuple[ActivationCache, ...]:
    """Every activation cache of this package (to inspect their sizes)."""
    return tuple(_ALL)


def clear_activation_caches() -> None:
    """Empty every activation cache (built-ins with parameters, compiled formulas)."""
    for cache in _ALL:
        cache.clear()
