"""Engine problems once seen through the service, kept as regression tests."""

from __future__ import annotations


def test_plan_hard_tanh_small_q_star_is_not_a_server_error(client):
    resp = client.post("/v1/plan", json={"activation": "hard_tanh", "depth": 3, "q_star": 1e-3})
    assert resp.status_code in (200, 422)
