"""Every cache the service fills from client input is bounded (issue 11 section 4, memory).

Many distinct activations (leaky_relu slopes, formulas), requests and images go
through one app; its caches (parsed activations, result bodies, images) and the
engine's activation caches stay within their limits, and the Python heap
(tracemalloc) stops growing once the caches are full: before the caches were
bounded, each distinct leaky_relu kept about 7 kB for ever (issue 11). Source:
the service's own limits (docs/service.md, "Caching"); the allowance for heap
noise is common practice, no source.
"""

from __future__ import annotations

import tracemalloc

import pytest

from propcalc.activations.cache import activation_caches

pytestmark = pytest.mark.slow


def _describe(client, i: int) -> None:
    resp = client.post("/v1/describe", json={
        "activation": {"name": "leaky_relu", "params": {"slope": 0.01 + 1e-5 * i}}})
    assert resp.status_code == 200


def test_distinct_activations_do_not_grow_the_heap(make_client):
    c = make_client(ACTIVATION_CACHE_ENTRIES=64, RESULT_CACHE_ENTRIES=64,
                    VALIDATE_RESPONSES=False)
    st = c.application.extensions["propcalc_api"]
    for i in range(300):  # fill every cache first
        _describe(c, i)
    tracemalloc.start()
    try:
        for i in range(300, 500):
            _describe(c, i)
        before = tracemalloc.get_traced_memory()[0]
        for i in range(500, 900):
            _describe(c, i)
        grown = tracemalloc.get_traced_memory()[0] - before
    finally:
        tracemalloc.stop()
    # 400 more distinct activations kept for ever would be about 2.8 MB
    assert grown < 1_000_000, grown
    assert len(st.computations._activations) <= 64
    assert st.results.stats().entries <= 64
    for cache in activation_caches():
        assert len(cache) <= cache.max_entries


def test_result_cache_bounded_in_entries_and_bytes(make_client):
    c = make_client(RESULT_CACHE_ENTRIES=40, RESULT_CACHE_BYTES=30_000, VALIDATE_RESPONSES=False)
    st = c.application.extensions["propcalc_api"]
    for i in range(120):
        assert c.post("/v1/critical-point", json={"activation": "tanh",
                                                  "q_star": 0.5 + 0.01 * i}).status_code == 200
        stats = st.results.stats()
        assert stats.entries <= 40 and stats.bytes <= 30_000
    assert stats.misses >= 120 and stats.entries > 0


def test_formula_activations_bounded(make_client):
    c = make_client(ACTIVATION_CACHE_ENTRIES=16, VALIDATE_RESPONSES=False)
    st = c.application.extensions["propcalc_api"]
    for i in range(60):
        resp = c.post("/v1/describe", json={"activation": {
            "formula": f"x * sigmoid({1 + i / 100:g} * x)"}})
        assert resp.status_code == 200
    assert len(st.computations._activations) <= 16
    for cache in activation_caches():
        assert len(cache) <= cache.max_entries


def test_image_cache_bounded_in_entries(make_client):
    pytest.importorskip("matplotlib")
    c = make_client(PLOT_CACHE_ENTRIES=3, PLOT_CACHE_BYTES=10**7, VALIDATE_RESPONSES=False)
    st = c.application.extensions["propcalc_api"]
    for i in range(6):
        resp = c.post("/v1/plots/correlation-map", json={
            "activation": "tanh", "sigma_w2": 1.5 + 0.1 * i, "n_points": 11, "format": "svg"})
        assert resp.status_code == 200
        assert st.images.stats().entries <= 3
    assert st.images.stats().entries == 3
