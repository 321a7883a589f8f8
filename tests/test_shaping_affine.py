"""Deep kernel shaping and the tailored transformation of general activations.

The conditions of each method (Martens et al. 2021, section 4; Zhang et al. 2022,
section 4) are checked with propcalc's own maps on ``.activation`` and on an activation
rebuilt from every reported root; the small-alpha limit against a Taylor expansion
derived in the module doc of propcalc.shaping.affine (closed form).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

import propcalc
from propcalc.meanfield.maps import (correlation_map, correlation_map_slope, variance_map,
                                     variance_map_slope)
from propcalc.numerics.quadrature import gaussian_expectation
from propcalc.shaping.transform import affine_activation

TOL = 1e-10  # the bar for every condition


def _slope_at_one(act):
    # C'(1) by the slope map at c = 1 (Price's theorem), not through chi_1
    return float(correlation_map_slope(act, 1.0, 1.0, 0.0, 1.0))


def _network_c0(act, depth):
    c = 0.0
    for _ in range(depth):
        c = float(correlation_map(act, c, 1.0, 0.0, 1.0))
    return c


def _dks_conditions(act, depth, zeta):
    xi = zeta ** (1.0 / depth)
    return {"Q(1)": (float(variance_map(act, 1.0, 1.0, 0.0)), 1.0),
            "Q'(1)": (float(variance_map_slope(act, 1.0, 1.0)), 1.0),
            "C(0)": (float(correlation_map(act, 0.0, 1.0, 0.0, 1.0)), 0.0),
            "C'(1)": (_slope_at_one(act), xi)}


def _tat_conditions(act, depth, eta):
    return {"Q(1)": (float(variance_map(act, 1.0, 1.0, 0.0)), 1.0),
            "Q'(1)": (float(variance_map_slope(act, 1.0, 1.0)), 1.0),
            "C'(1)": (_slope_at_one(act), 1.0),
            "C_L(0)": (_network_c0(act, depth), eta)}


def _assert_conditions(conds):
    for name, (got, want) in conds.items():
        assert abs(got - want) <= TOL, (name, got, want)


DKS_CASES = [("tanh", 100, 1.5), ("gelu", 60, 2.0), ("softplus", 100, 1.5), ("erf", 30, 1.2),
             ("elu", 100, 1.5), ("x * sigmoid(beta * x)", 80, 1.5)]
TAT_CASES = [("tanh", 100, 0.9), ("gelu", 50, 0.8), ("softplus", 100, 0.9),
             ("x * tanh(softplus(x))", 60, 0.9)]


def _make(spec):
    return propcalc.activation(spec, beta=1.5) if "beta" in spec else propcalc.activation(spec)


@pytest.mark.parametrize("spec,depth,zeta", DKS_CASES)
def test_dks_conditions_hold_for_every_root(spec, depth, zeta):
    base = _make(spec)
    shaped = propcalc.shape_activation(base, depth, target=zeta, method="dks")
    assert shaped.method == "dks" and shaped.form == "affine"
    assert set(shaped.params) == {"alpha", "beta", "gamma", "delta"}
    _assert_conditions(_dks_conditions(shaped.activation, depth, zeta))
    # the whole network: C_L'(1) = zeta (the per-layer slope to the power L)
    assert _slope_at_one(shaped.activation) ** depth == pytest.approx(zeta, rel=1e-12)
    assert shaped.network_slope_at_1 == pytest.approx(zeta, rel=1e-12)
    assert sum(r.chosen for r in shaped.roots) == 1
    for root in shaped.roots:  # rebuilt from the reported numbers alone
        act = affine_activation(base, root.alpha, root.beta, root.gamma, root.delta)
        _assert_conditions(_dks_conditions(act, depth, zeta))
        assert root.max_deviation <= TOL


@pytest.mark.parametrize("spec,depth,eta", TAT_CASES)
def test_tat_conditions_hold_for_every_root(spec, depth, eta):
    base = _make(spec)
    shaped = propcalc.shape_activation(base, depth, target=eta, method="tat")
    assert shaped.form == "affine"
    _assert_conditions(_tat_conditions(shaped.activation, depth, eta))
    assert shaped.network_map_at_0 == pytest.approx(eta, abs=TOL)
    for root in shaped.roots:
        act = affine_activation(base, root.alpha, root.beta, root.gamma, root.delta)
        _assert_conditions(_tat_conditions(act, depth, eta))
    assert shaped.depth_verdict.phase == "edge of chaos"


def test_dks_small_alpha_limit_for_tanh():
    # Taylor expansion of the conditions for small alpha (derived in propcalc.shaping.affine's
    # doc): Q'(1) - 1 ~ alpha^2 (phi''^2 + 2 phi' phi''') / (2 phi'^2) vanishes where
    # tanh(beta) = +-1/2, and C'(1) - 1 ~ alpha^2 phi''^2 / (2 phi'^2) = alpha^2 / 2 there,
    # so alpha ~ sqrt(2 ln(zeta) / L) as L grows (closed form).
    depth, zeta = 5000, 1.5
    shaped = propcalc.shape_activation("tanh", depth, target=zeta, method="dks")
    # measured: 4e-4 and 9e-5 off at L = 5000 (the next order is O(1 / L))
    assert abs(shaped.params["beta"]) == pytest.approx(math.atanh(0.5), rel=1e-3)
    assert shaped.params["alpha"] == pytest.approx(math.sqrt(2 * math.log(zeta) / depth),
                                                   rel=1e-3)


def test_odd_activation_roots_come_in_mirror_pairs():
    # tanh is odd: (alpha, beta, gamma, delta) and (alpha, -beta, gamma, -delta) give the same
    # maps (phi_hat(-x) = -phi_hat(x) reflected); the tie is settled by beta > 0
    shaped = propcalc.shape_activation("tanh", 100, target=0.9, method="tat")
    roots = shaped.roots
    assert len(roots) % 2 == 0
    for r in roots:
        assert any(abs(s.beta + r.beta) < 1e-8 and abs(s.alpha - r.alpha) < 1e-8 for s in roots)
    chosen = [r for r in roots if r.chosen][0]
    assert chosen.beta > 0
    assert chosen.variance_map_deviation <= min(r.variance_map_deviation for r in roots) + 1e-9


def test_choice_rule_picks_the_flattest_variance_map():
    shaped = propcalc.shape_activation("gelu", 100, target=1.5, method="dks")
    devs = [r.variance_map_deviation for r in shaped.roots]
    chosen = [r for r in shaped.roots if r.chosen][0]
    assert chosen.variance_map_deviation == min(devs)
    # recomputed independently: max |Q(q) - q| on q in [1/2, 2]
    qs = np.geomspace(0.5, 2.0, 17)
    dev = float(np.max(np.abs(variance_map(shaped.activation, qs, 1.0, 0.0) - qs)))
    assert dev == pytest.approx(chosen.variance_map_deviation, rel=1e-12)
    assert "identity" in shaped.choice_rule


def test_formula_text_rebuilds_the_activation():
    for spec, method in (("gelu", "tat"), ("x * sigmoid(beta * x)", "dks"), ("elu", "dks")):
        shaped = propcalc.shape_activation(_make(spec), 50, method=method)
        again = propcalc.activation(shaped.formula, **shaped.params)
        x = np.linspace(-30, 30, 3001)
        np.testing.assert_allclose(again.value(x), shaped.activation.value(x), rtol=1e-13,
                                   atol=1e-13)
        np.testing.assert_allclose(again.derivative(x), shaped.activation.derivative(x),
                                   rtol=1e-12, atol=1e-13)


def test_smoothing_is_kept_and_exact():
    # E[phi_hat(m + sqrt(v) z)] from the transformed closed form against quadrature
    shaped = propcalc.shape_activation("gelu", 40, method="dks")
    act = shaped.activation
    assert act.smoothing is not None
    for m, v in ((0.0, 1.0), (0.7, 0.3), (-2.0, 4.0)):
        want = float(gaussian_expectation(act.value, v, act.breakpoints, mean=m))
        got = float(act.smoothing.value(np.array(m), np.array(v)))
        assert got == pytest.approx(want, rel=1e-12, abs=1e-14)
        want_d = float(gaussian_expectation(act.derivative, v, act.breakpoints, mean=m))
        assert float(act.smoothing.derivative(np.array(m), np.array(v))) == pytest.approx(
            want_d, rel=1e-12)


def test_curvature_against_the_slope_map():
    # C''(1) reported from the second symbolic derivative, against a one-sided difference of
    # propcalc's slope map with Richardson extrapolation (error O(h^2))
    shaped = propcalc.shape_activation("tanh", 100, target=0.9, method="tat")
    act = shaped.activation
    h = 1e-3
    s0 = _slope_at_one(act)
    d1 = (s0 - float(correlation_map_slope(act, 1 - h, 1.0, 0.0, 1.0))) / h
    d2 = (s0 - float(correlation_map_slope(act, 1 - h / 2, 1.0, 0.0, 1.0))) / (h / 2)
    assert shaped.layer_map.curvature_at_1 == pytest.approx(2 * d2 - d1, rel=1e-5)
    # a kinked base: infinite curvature (the map goes like c + k (1 - c)^(3/2))
    assert propcalc.shape_activation("relu", 50).layer_map.curvature_at_1 == math.inf


def test_shaped_activation_works_everywhere():
    shaped = propcalc.shape_activation("softplus", 80, method="dks")
    act = shaped.activation
    report = propcalc.propagation(act, 1.0, 0.0, depth=80)
    assert report.phase == "chaotic"  # C'(1) = zeta^(1/L) > 1
    assert report.q_star == pytest.approx(1.0, rel=1e-12)
    assert report.c_star == pytest.approx(0.0, abs=1e-12)  # C(0) = 0 is the fixed point
    assert act.properties.smoothness == "smooth"
    assert shaped.propagation.chi_1 == pytest.approx(report.chi_1, rel=1e-14)
    assert shaped.depth_verdict.gradient_growth == pytest.approx(1.5, rel=1e-10)


def test_network_map_method():
    shaped = propcalc.shape_activation("tanh", 30, target=0.7)
    c = np.array([0.0, 0.5, -0.5, 1.0])
    got = shaped.network_map(c)
    assert got[0] == pytest.approx(0.7, abs=1e-12)
    assert got[3] == pytest.approx(1.0, abs=1e-13)
    want = c.copy()
    for _ in range(30):
        want = correlation_map(shaped.activation, want, 1.0, 0.0, 1.0)
    np.testing.assert_allclose(got, want, atol=1e-13)


def test_dict_form_is_strict_json():
    import json

    shaped = propcalc.shape_activation("tanh", 20, method="dks")
    d = shaped.to_dict()
    assert "activation" not in d and "propagation" not in d and "base_activation" not in d
    assert d["formula"] == "gamma * (tanh(alpha * x + beta) + delta)"
    assert d["sigma_w2"] == 1.0 and d["sigma_b2"] == 0.0
    text = json.dumps(propcalc.jsonable(d), allow_nan=False)
    assert '"roots"' in text and '"depth_verdict"' in text


def test_homogeneous_activation_has_no_dks_root():
    with pytest.raises(propcalc.ShapingError, match="positively homogeneous"):
        propcalc.shape_activation("relu", 50, method="dks")


def test_linear_activation_cannot_be_shaped():
    with pytest.raises(propcalc.ShapingError, match="affine"):
        propcalc.shape_activation("linear", 50, method="dks")
    with pytest.raises(propcalc.ShapingError, match="nothing to shape"):
        propcalc.shape_activation("2 * x + 1", 50, method="tat")


def test_typed_homogeneous_formula_is_refused_with_the_way_out():
    with pytest.raises(propcalc.ShapingError, match="leaky_relu' with method 'tat'"):
        propcalc.shape_activation("where(x > 0, x, 0.2 * x)", 50, method="tat")


def test_no_root_is_reported_with_the_search_region():
    # hard_tanh: the curve Q'(1) = 1 runs along beta = 1, where f = alpha min(z, 0) + 1 up to
    # the clip and C'(1) = (1/2) / (1/2 - 1/(2 pi)) = 1.467 for every alpha (closed form), so
    # there is no DKS root at zeta^(1/L) = 1.5^(1/100)
    with pytest.raises(propcalc.ShapingError, match="searched alpha in"):
        propcalc.shape_activation("hard_tanh", 100, method="dks")


@pytest.mark.parametrize("kwargs,field", [
    (dict(act="tanh", depth=0), "depth"),
    (dict(act="tanh", depth=10001), "depth"),
    (dict(act="tanh", depth=2.5), "depth"),
    (dict(act="tanh", depth=10, method="ntk"), "method"),
    (dict(act="tanh", depth=10, target=1.0), "target"),
    (dict(act="tanh", depth=10, target=0.0), "target"),
    (dict(act="tanh", depth=10, target=float("nan")), "target"),
    (dict(act="tanh", depth=10, target=True), "target"),
    (dict(act="tanh", depth=10, target=0.9, method="dks"), "target"),
    (dict(act="tanh", depth=10, target=2e6, method="dks"), "target"),
    (dict(act="step", depth=10), "activation"),
    (dict(act="tanh", depth=10, allow_negative_slope="yes"), "allow_negative_slope"),
])
def test_bad_input_names_the_field(kwargs, field):
    act = kwargs.pop("act")
    depth = kwargs.pop("depth")
    with pytest.raises(propcalc.InvalidParameterError) as info:
        propcalc.shape_activation(act, depth, **kwargs)
    assert info.value.field == field
