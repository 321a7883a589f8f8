"""Tests of propcalc.vocabulary and propcalc.caches: the words, the tolerances, the cache registry.

The vocabulary is propcalc's own contract (no outside source): the enum members must be the
strings every dict, table and JSON document has always carried.
"""

from __future__ import annotations

import json

import numpy as np
import pytest

import propcalc
from propcalc import caches, vocabulary
from propcalc.errors import InvalidParameterError
from propcalc.vocabulary import Phase, VarianceStatus


def test_enums_are_their_strings():
    assert Phase.EDGE_OF_CHAOS == "edge of chaos" and f"{Phase.ORDERED}" == "ordered"
    assert json.dumps({"phase": Phase.CHAOTIC}) == '{"phase": "chaotic"}'
    assert vocabulary.PHASES == ("ordered", "edge of chaos", "chaotic", "unbounded variance")
    assert vocabulary.VARIANCE_STATUSES == ("fixed_point", "collapse", "unbounded", "neutral")
    assert vocabulary.DISTRIBUTIONS == ("normal", "uniform", "truncated_normal", "orthogonal")
    assert vocabulary.TARGETS == ("auto", "edge", "variance", "bias")
    assert vocabulary.NEUTRAL_TOLERANCE == vocabulary.EDGE_TOLERANCE == 1e-9


def test_results_carry_the_vocabulary_and_keep_their_json():
    p = propcalc.propagation("tanh", 1.0, 0.0)
    assert isinstance(p.phase, Phase) and isinstance(p.status, VarianceStatus)
    d = json.loads(json.dumps(propcalc.jsonable(p.to_dict())))
    assert (d["phase"], d["status"]) == ("edge of chaos", "collapse")
    assert d["variance_fixed_points"]["status"] == "collapse"
    grid = propcalc.sweep("tanh", [0.5, 1.0, 3.0], [0.0, 0.1], progress=False)
    assert set(np.unique(grid.phase)) <= set(vocabulary.PHASES)
    assert set(np.unique(grid.status)) <= set(vocabulary.VARIANCE_STATUSES)


def test_no_tolerance_literal_left_for_the_edge():
    # the "neutral or attracting" 1e-9 is named once (vocabulary): no module compares a slope
    # with 1 - 1e-9 or |x - 1| <= 1e-9 by a literal any more
    import pathlib
    import re
    root = pathlib.Path(propcalc.__file__).parent
    pattern = re.compile(r"(1(\.0)? - 1e-9)|(- 1(\.0)?\) <= 1e-9)|(- 1(\.0)?\) > 1e-9)")
    offenders = [str(p.relative_to(root)) for p in root.rglob("*.py")
                 if pattern.search(p.read_text())]
    assert offenders == []


def test_clear_caches_empties_every_registered_cache():
    # warm every cache of the engine, then empty them all through the one public call
    act = propcalc.activation("tanh")
    propcalc.propagation(act, 2.0, 0.05)
    propcalc.correlation_map(act, np.linspace(-1, 1, 5), 1.5, 0.1, 1.0)
    propcalc.propagation("hard_tanh", 1.6, 0.1)
    registered = caches.caches()
    assert {"hermite.coefficients", "hermite.tables"} <= set(registered)
    assert any(len(c) for c in registered.values())
    for cache in registered.values():
        assert 1 <= cache.maxsize  # every cache bounded
    propcalc.clear_caches()
    assert {name: len(c) for name, c in caches.caches().items()} == {
        name: 0 for name in caches.caches()}
    # the numbers do not depend on what was cached
    again = propcalc.propagation(act, 2.0, 0.05)
    assert again.c_star == propcalc.propagation(act, 2.0, 0.05).c_star


def test_bounded_cache_keeps_its_bound_and_names_are_unique():
    cache = caches.BoundedCache("test.bounded", maxsize=3)
    for k in range(10):
        cache.put(k, k * k)
    assert len(cache) == 3 and cache.get(9) == 81 and cache.get(0) is None
    cache.get(7)  # recently used: survives the next insertion
    cache.put(10, 100)
    assert cache.get(7) == 49 and cache.get(8) is None
    with pytest.raises(InvalidParameterError, match="name must be a name no other cache has"):
        caches.BoundedCache("test.bounded", maxsize=3)
    with pytest.raises(InvalidParameterError, match="maxsize must be an integer >= 1"):
        caches.BoundedCache("test.unbounded", maxsize=0)
