"""POST /v1/plan with a loss (issue 15): the readout scaled for it and the learning-rate ceiling.

Every 200 body equals ``propcalc.jsonable(propcalc.recommend(...).to_dict())`` of the same call
(the app also loads it back through its response schema). The ceiling is checked against the
stability bound of (heavy-ball) gradient descent on a quadratic of top curvature lambda_max:
lr < 2 (1 + momentum) / lambda_max (heavy-ball method, Polyak 1964, from memory; for momentum 0
the classical bound 2 / lambda_max of gradient descent on a quadratic).
"""

from __future__ import annotations

import pytest
from numpy.testing import assert_allclose

import propcalc
from propcalc import jsonable

INVALID = "tag:propcalc,2025:problem:invalid-fields"
BUDGET = "tag:propcalc,2025:problem:work-budget-exceeded"


@pytest.mark.parametrize("body", [
    {"activation": "tanh", "widths": [64, 128, 128, 10], "loss": "cross_entropy",
     "n_classes": 10, "batch_size": 32},
    {"activation": "relu", "widths": [32, 64, 64, 64, 1], "loss": "mse", "batch_size": 128,
     "momentum": 0.9, "input_correlation": 0.2},
    {"activation": "gelu", "widths": [16, 32, 3], "loss": "cross_entropy", "n_classes": 3,
     "batch_size": 8, "scale_output": False, "distribution": "orthogonal"},
])
def test_plan_with_a_loss_equals_the_python_api(client, strict_json, body):
    resp = client.post("/v1/plan", json=body)
    assert resp.status_code == 200, resp.get_data(as_text=True)[:2000]
    got = strict_json(resp.data)
    args = {k: v for k, v in body.items() if k not in ("activation",)}
    expected = propcalc.recommend(body["activation"], **args)
    assert got == jsonable(expected.to_dict())
    details = got["learning_rate_details"]
    momentum = body.get("momentum", 0.0)
    assert_allclose(got["learning_rate_ceiling"] * details["lambda_max"], 2 * (1 + momentum),
                    rtol=1e-12)
    assert 0 < got["learning_rate"] < got["learning_rate_ceiling"]


def test_plan_without_a_loss_is_unchanged(client, strict_json):
    got = strict_json(client.post("/v1/plan", json={"activation": "tanh", "depth": 5}).data)
    assert got == jsonable(propcalc.recommend("tanh", 5).to_dict())
    assert got["learning_rate_ceiling"] is None and got["learning_rate"] is None


@pytest.mark.parametrize("body, pointer", [
    ({"activation": "tanh", "widths": [8, 8, 2], "loss": "mse"}, "/batch_size"),
    ({"activation": "tanh", "widths": [8, 8, 2], "loss": "cross_entropy", "batch_size": 4},
     "/n_classes"),
    ({"activation": "tanh", "depth": 3, "loss": "mse", "batch_size": 4}, "/widths"),
    ({"activation": "tanh", "widths": [8, 8, 2], "batch_size": 4}, "/batch_size"),
    ({"activation": "tanh", "widths": [8, 8, 2], "n_classes": 2}, "/n_classes"),
    ({"activation": "tanh", "widths": [8, 8, 2], "loss": "hinge", "batch_size": 4}, "/loss"),
    ({"activation": "tanh", "widths": [8, 8, 2], "loss": "mse", "batch_size": 4,
      "momentum": 1.0}, "/momentum"),
    # the readout's Monte Carlo check draws 100000 samples of K logits, at most 5e7 numbers
    ({"activation": "tanh", "widths": [8, 8, 600], "loss": "cross_entropy", "n_classes": 600,
      "batch_size": 4}, "/n_classes"),
])
def test_bad_training_members(client, body, pointer):
    resp = client.post("/v1/plan", json=body)
    assert resp.status_code == 422, resp.get_data(as_text=True)
    got = resp.get_json()
    assert got["type"] == INVALID and [e["pointer"] for e in got["errors"]] == [pointer], got


def test_the_engine_checks_the_classes_against_the_last_width(client):
    resp = client.post("/v1/plan", json={"activation": "tanh", "widths": [8, 8, 3],
                                         "loss": "cross_entropy", "n_classes": 4,
                                         "batch_size": 4})
    assert resp.status_code == 422, resp.get_data(as_text=True)
    assert resp.get_json()["type"] == INVALID


def test_the_work_budget(client):
    # the tangent kernel costs about 2.5 ms per layer: 1000 layers with a loss are refused
    widths = [64] * 1000 + [10]
    resp = client.post("/v1/plan", json={"activation": "relu", "widths": widths, "loss": "mse",
                                         "batch_size": 16})
    assert resp.status_code == 422, resp.get_data(as_text=True)[:500]
    got = resp.get_json()
    assert got["type"] == BUDGET and [e["pointer"] for e in got["errors"]] == ["/widths"]
    assert client.post("/v1/plan", json={"activation": "relu", "widths": widths}
                       ).status_code == 200
