"""Tests of the built-in demo scenario (propcalc.cli.demo, ``propcalc demo``).

The scenario is invented (a fictional company, no data read). Its claims are checked against
closed forms and the papers: tanh is critical at sigma_w2 = 1, sigma_b2 = 0 since tanh'(0) = 1
(Poole et al. 2016); GELU's only critical point at sigma_b2 = 0 is the q* -> 0 end of the line,
sigma_w2 = 1 / gelu'(0)^2 = 4 (gelu'(0) = Phi(0) = 1/2), where a unit-variance input makes the
variance grow by lim V(q)/q = 4 E[relu(z)^2] = 2 per layer; a weight std is
sqrt(sigma_w2 / fan_in) (fan-in convention of Poole et al. 2016 / He et al. 2015).
"""

from __future__ import annotations

import io
import json
import math
import re

import pytest

from propcalc import cli, jsonable
from propcalc.cli import demo


@pytest.fixture(scope="module")
def text() -> str:
    out = io.StringIO()
    assert demo.run(out=out) == 0
    return out.getvalue()


@pytest.fixture(scope="module")
def plans():
    return demo.plans()


def _block(text: str, key: str) -> str:
    start = text.index(f"== {key}\n")
    end = text.find("\n== ", start + 1)
    return text[start:] if end < 0 else text[start:end]


def test_mentions_the_fictional_scenario(text):
    assert "Tarnquill Instruments (fictional)" in text
    assert text.startswith(demo.SCENARIO)
    assert "64 layers" in text and "sigma_b2 = 0" in text


def test_the_network_shape(plans):
    assert demo.WIDTHS[0] == 48 and demo.WIDTHS[-1] == 6 and len(demo.WIDTHS) == 65
    for plan in plans.values():
        assert plan.depth == 64 and len(plan.layers) == 64


def test_gelu_without_bias_is_flagged(text, plans):
    block = _block(text, "gelu, sigma_b2 = 0")
    assert "PROBLEM" in block and "explodes" in block
    plan = plans["gelu, sigma_b2 = 0"]
    assert not plan.depth_ok
    assert plan.sigma_w2 == pytest.approx(4.0, rel=1e-9)  # 1 / gelu'(0)^2 (closed form)
    growth = plan.propagation.variance_fixed_points.growth_rate
    assert growth == pytest.approx(2.0, rel=1e-6)  # sigma_w2 E[relu(z)^2] = 4 / 2
    assert "grows by about 2" in text


def test_tanh_without_bias_is_fine(text, plans):
    block = _block(text, "tanh, sigma_b2 = 0")
    assert "OK:" in block and "PROBLEM" not in block
    plan = plans["tanh, sigma_b2 = 0"]
    assert plan.depth_ok
    assert plan.sigma_w2 == pytest.approx(1.0, rel=1e-9)  # 1 / tanh'(0)^2 (Poole et al. 2016)
    assert plan.propagation.phase == "edge of chaos"


def test_edge_of_chaos_plans_are_fine(text, plans):
    for key in ("tanh, edge of chaos", "gelu, edge of chaos"):
        assert "OK:" in _block(text, key)
        p = plans[key].propagation
        assert p.phase == "edge of chaos" and p.chi_1 == pytest.approx(1.0, abs=1e-9)
    # GELU needs a bias variance to reach an attracting point
    assert plans["gelu, edge of chaos"].sigma_b2 > 0
    assert "Check: propagation at that point gives chi_1 = 1.000000" in text


_STD = re.compile(r"weight std: layer 1 \((\d+) inputs\) ([0-9.]+); layers 2-(\d+) \(512 inputs\) "
                  r"([0-9.]+); layer (\d+) ([0-9.]+); bias std ([0-9.]+)")


@pytest.mark.parametrize("key", ["tanh, sigma_b2 = 0", "tanh, edge of chaos",
                                 "gelu, edge of chaos"])
def test_per_layer_stds_are_printed(text, plans, key):
    m = _STD.search(_block(text, key))
    assert m, key
    plan = plans[key]
    fan1, std1, _, std_mid, last, std_last, bias = m.groups()
    assert int(fan1) == 48 and int(last) == 64
    # std = sqrt(sigma_w2 / fan_in) for each layer, printed to 5 decimals
    assert float(std1) == pytest.approx(math.sqrt(plan.layers[0].sigma_w2 / 48), abs=6e-6)
    assert float(std_mid) == pytest.approx(math.sqrt(plan.sigma_w2 / 512), abs=6e-6)
    assert float(std_last) == pytest.approx(math.sqrt(plan.sigma_w2 / 512), abs=6e-6)
    assert float(bias) == pytest.approx(math.sqrt(plan.sigma_b2), abs=6e-6)


def test_tanh_without_bias_stds_in_closed_form(text):
    # sigma_w2 = 1 everywhere: 1 / sqrt(48) = 0.14434, 1 / sqrt(512) = 0.04419
    m = _STD.search(_block(text, "tanh, sigma_b2 = 0"))
    assert m.group(2) == f"{1 / math.sqrt(48):.5f}" and m.group(4) == f"{1 / math.sqrt(512):.5f}"


def _strict(text: str):
    def refuse(token):
        raise AssertionError(f"non-standard JSON token {token!r}")
    return json.loads(text, parse_constant=refuse)


def test_json_output(plans):
    out = io.StringIO()
    assert demo.run(out=out, as_json=True) == 0
    data = _strict(out.getvalue())
    assert data["scenario"] == demo.SCENARIO and data["widths"] == demo.WIDTHS
    assert set(data["plans"]) == set(plans)
    for key, plan in plans.items():
        assert data["plans"][key] == jsonable(plan.to_dict())
    assert data["plans"]["gelu, sigma_b2 = 0"]["q_star"] is None


def test_cli_demo_matches_run(text):
    out, err = io.StringIO(), io.StringIO()
    assert cli.main(["demo"], out=out, err=err) == 0
    assert out.getvalue() == text and err.getvalue() == ""
    out = io.StringIO()
    assert cli.main(["demo", "--json"], out=out, err=io.StringIO()) == 0
    assert _strict(out.getvalue())["scenario"] == demo.SCENARIO
