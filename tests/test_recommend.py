"""Tests of gains and initialisation plans (propcalc.init: layers, gains, plan, planner).

References, each named beside its check:

* mpmath 1.3 quadrature (``mpmath.quad`` at 30 digits, split at breakpoints) for every
  Gaussian expectation, ``mpmath.findroot`` for fixed points and ``mpmath.diff`` for slopes;
* closed forms: E[relu(z)^2] = 1/2, the leaky-ReLU moments (1 + a^2) / 2, the erf moments of
  Williams 1998, the variance of U(-a, a) (a^2 / 3);
* scipy.stats.truncnorm and seeded numpy sampling for the truncated normal law,
  scipy.stats.ortho_group for (semi-)orthogonal matrices;
* the papers: Poole et al. 2016 (variance map, edge-of-chaos line), Schoenholz et al. 2017
  (chi_1, xi_c, the 6 xi_c trainable-depth rule), He et al. 2015 (ReLU / leaky-ReLU gains,
  fan-in of convolutions), Glorot & Bengio 2010 (fan-in and fan-out).
"""

from __future__ import annotations

import math

import mpmath as mp
import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import stats

from propcalc import (
    ComputationError,
    Gains,
    InitPlan,
    InvalidParameterError,
    Layer,
    LayerInit,
    activation,
    builtin_names,
    gains,
    propagation,
    recommend,
)
from propcalc.init.gains import COMMON_GAINS
from propcalc.init.layers import TRUNCATION, truncated_normal_factor


@pytest.fixture(autouse=True, scope="module")
def _mp_precision():
    """30 significant digits for every mpmath reference here (restored afterwards)."""
    with mp.workdps(30):
        yield

# ---------------------------------------------------------------------------------------------
# mpmath references
# ---------------------------------------------------------------------------------------------
with mp.workdps(40):  # Klambauer et al. 2017, eq. (14)
    _SELU_A = mp.mpf("1.6732632423543772848170429916717")
    _SELU_L = mp.mpf("1.0507009873554804934193349852946")


def _sig(x):
    return 1 / (1 + mp.exp(-x))


def _sp(x):
    return x + mp.log1p(mp.exp(-x)) if x > 0 else mp.log1p(mp.exp(x))


MP_PHI = {
    "linear": lambda x: x,
    "step": lambda x: mp.mpf(1) if x >= 0 else mp.mpf(0),
    "sigmoid": _sig,
    "tanh": mp.tanh,
    "relu": lambda x: x if x > 0 else mp.mpf(0),
    "leaky_relu": lambda x: x if x > 0 else mp.mpf("0.01") * x,
    "elu": lambda x: x if x > 0 else mp.expm1(x),
    "selu": lambda x: _SELU_L * (x if x > 0 else _SELU_A * mp.expm1(x)),
    "softplus": _sp,
    "gelu": lambda x: x * mp.ncdf(x),                          # Hendrycks & Gimpel 2016
    "gelu_tanh": lambda x: x * _sig(2 * mp.sqrt(2 / mp.pi) * (x + mp.mpf("0.044715") * x**3)),
    "silu": lambda x: x * _sig(x),
    "swish": lambda x: x * _sig(x),
    "mish": lambda x: x * mp.tanh(_sp(x)),
    "erf": mp.erf,
    "hard_tanh": lambda x: max(mp.mpf(-1), min(mp.mpf(1), x)),
}
MP_BREAKS = {"step": (0,), "relu": (0,), "leaky_relu": (0,), "elu": (0,), "selu": (0,),
             "hard_tanh": (-1, 1)}


def mp_gauss(f, q=1, breaks=()):
    """E[f(sqrt(q) z)], z ~ N(0, 1), by mpmath.quad split at the breakpoints (in z)."""
    s = mp.sqrt(q)
    pts = sorted({mp.mpf(0)} | {mp.mpf(b) / s for b in breaks})
    return mp.quad(lambda z: f(s * z) * mp.npdf(z), [-mp.inf, *pts, mp.inf])


def mp_dphi(name):
    phi = MP_PHI[name]
    return lambda x: mp.diff(phi, x)


def mp_m2(name, q=1):
    """E[phi(sqrt(q) z)^2]."""
    phi = MP_PHI[name]
    return mp_gauss(lambda x: phi(x) ** 2, q, MP_BREAKS.get(name, ()))


def mp_d2(name, q=1):
    """E[phi'(sqrt(q) z)^2] (phi' by mpmath.diff, away from the measure-zero breakpoints)."""
    d = mp_dphi(name)
    return mp_gauss(lambda x: d(x) ** 2, q, MP_BREAKS.get(name, ()))


def mp_V(name, q, sw, sb):
    # Poole et al. 2016, eq. (3)
    return sw * mp_m2(name, q) + sb


def mp_fixed_point(name, sw, sb, q0):
    return mp.findroot(lambda q: mp_V(name, q, sw, sb) - q, mp.mpf(q0))


def mp_chi_q(name, q, sw):
    # V'(q*) by numerical differentiation of the mpmath quadrature in q (no Stein identity)
    return sw * mp.diff(lambda t: mp_m2(name, t), mp.mpf(q))


# ---------------------------------------------------------------------------------------------
# gains
# ---------------------------------------------------------------------------------------------
@pytest.mark.parametrize("name", [n for n in builtin_names() if n != "step"])
def test_forward_and_backward_gains_match_mpmath(name):
    # forward = 1 / sqrt(E[phi(z)^2]) keeps q = 1 fixed with sigma_b2 = 0 (Poole et al. 2016,
    # eq. 3); backward = 1 / sqrt(E[phi'(z)^2]) gives chi_1 = 1 at q = 1 (Schoenholz et al.
    # 2017, eq. 8). Expectations by mpmath.quad, phi' by mpmath.diff.
    g = gains(activation(name))
    assert isinstance(g, Gains) and g.activation == activation(name).label
    assert g.forward == pytest.approx(float(1 / mp.sqrt(mp_m2(name))), rel=1e-12)
    assert g.backward == pytest.approx(float(1 / mp.sqrt(mp_d2(name))), rel=1e-12)


def test_gains_closed_forms():
    # ReLU: E[relu(z)^2] = E[1{z > 0}] = 1/2, so both gains are sqrt(2) (He et al. 2015, eq. 10)
    g = gains(activation("relu"))
    assert g.forward == pytest.approx(math.sqrt(2), rel=1e-14)
    assert g.backward == pytest.approx(math.sqrt(2), rel=1e-14)
    # linear: both 1
    g = gains(activation("linear"))
    assert (g.forward, g.backward) == (pytest.approx(1, rel=1e-14), pytest.approx(1, rel=1e-14))
    # erf (Williams 1998, arcsine kernel): E[erf(z)^2] = (2/pi) arcsin(2/3);
    # E[erf'(z)^2] = (4/pi) E[exp(-2 z^2)] = 4 / (pi sqrt(5))
    g = gains(activation("erf"))
    assert g.forward == pytest.approx(1 / math.sqrt(2 / math.pi * math.asin(2 / 3)), rel=1e-13)
    assert g.backward == pytest.approx(1 / math.sqrt(4 / (math.pi * math.sqrt(5))), rel=1e-13)
    # hard_tanh: E[phi'^2] = P(|z| < 1) = erf(1/sqrt 2); E[phi^2] = P(|z|<1) - 2 pdf(1) + P(|z|>1)
    p_in = math.erf(1 / math.sqrt(2))
    m2 = p_in - 2 * math.exp(-0.5) / math.sqrt(2 * math.pi) + (1 - p_in)
    g = gains(activation("hard_tanh"))
    assert g.forward == pytest.approx(1 / math.sqrt(m2), rel=1e-13)
    assert g.backward == pytest.approx(1 / math.sqrt(p_in), rel=1e-13)
    # SELU keeps unit variance by construction (Klambauer et al. 2017): forward gain 1
    assert gains(activation("selu")).forward == pytest.approx(1.0, rel=1e-13)


def test_step_gains():
    # E[step(z)^2] = 1/2 (closed form) -> forward sqrt 2; a jump makes E[phi'^2] infinite
    # (phi' carries a Dirac mass), which propcalc reports as backward gain 0 with a note.
    g = gains(activation("step"))
    assert g.forward == pytest.approx(math.sqrt(2), rel=1e-14)
    assert g.backward == 0.0
    assert any("infinite" in n for n in g.notes)


def test_common_practice_constants():
    # Fixed gains found in common practice (common practice, no source): tanh 5/3, ReLU sqrt 2,
    # linear and sigmoid 1.
    assert COMMON_GAINS == {"linear": 1.0, "sigmoid": 1.0, "tanh": 5 / 3, "relu": math.sqrt(2)}
    for name, g0 in COMMON_GAINS.items():
        g = gains(activation(name))
        assert g.common_gain == g0
        assert g.common_gain_sigma_w2 == pytest.approx(g0 * g0, rel=1e-15)
        assert any("common practice, no source" in n for n in g.notes)
    for name in ("gelu", "silu", "elu", "erf"):
        assert gains(activation(name)).common_gain is None


def test_tanh_five_thirds_is_chaotic():
    # sigma_w2 = 25/9, sigma_b2 = 0: q* solves q = (25/9) E[tanh(sqrt(q) z)^2] (Poole et al.
    # 2016, eq. 3) and chi_1 = (25/9) E[sech^4(sqrt(q*) z)] (Schoenholz et al. 2017, eq. 8),
    # both by mpmath here: chi_1 = 1.2098 > 1, the chaotic phase.
    sw = mp.mpf(25) / 9
    q = mp_fixed_point("tanh", sw, 0, 1.2)
    chi1 = float(sw * mp_gauss(lambda x: mp.sech(x) ** 4, q))
    assert chi1 == pytest.approx(1.2098313203828, rel=1e-12)  # value from this mpmath run
    g = gains(activation("tanh"))
    assert g.common_gain_chi_1 == pytest.approx(chi1, rel=1e-10)
    assert g.common_gain_phase == "chaotic"
    assert any("chaotic" in n and "1.20983" in n for n in g.notes)


def test_relu_sqrt2_and_linear_1_are_critical():
    # ReLU at sigma_w2 = 2: chi_1 = 2 * P(z > 0) = 1 (He et al. 2015); linear at 1: chi_1 = 1
    for name in ("relu", "linear"):
        g = gains(activation(name))
        assert g.common_gain_chi_1 == pytest.approx(1.0, rel=1e-12)
        assert g.common_gain_phase == "edge of chaos"


def test_sigmoid_gain_one_is_ordered():
    # sigma_w2 = 1, sigma_b2 = 0: q* = E[sigmoid(sqrt(q*) z)^2], chi_1 = E[sigmoid'(sqrt(q*) z)^2]
    # (Poole et al. 2016; Schoenholz et al. 2017), by mpmath: far below 1, the ordered phase.
    q = mp_fixed_point("sigmoid", 1, 0, 0.3)
    d = mp_dphi("sigmoid")
    chi1 = float(mp_gauss(lambda x: d(x) ** 2, q))
    g = gains(activation("sigmoid"))
    assert g.common_gain_chi_1 == pytest.approx(chi1, rel=1e-10)
    assert g.common_gain_phase == "ordered"


@pytest.mark.parametrize("slope", [0.01, 0.2, 0.5])
def test_leaky_relu_he_gain(slope):
    # He et al. 2015, section 2.2 (their eq. 15 for PReLU, from memory):
    # (1/2)(1 + a^2) n Var[w] = 1, i.e. gain sqrt(2 / (1 + a^2)). Closed forms:
    # E[phi(z)^2] = E[phi'(z)^2] = (1 + a^2) / 2, so forward = backward = He gain, and at
    # sigma_w2 = 2 / (1 + a^2), sigma_b2 = 0 the network is exactly critical (chi_1 = 1).
    act = activation("leaky_relu", slope=slope)
    he = math.sqrt(2 / (1 + slope * slope))
    g = gains(act)
    assert g.common_gain == pytest.approx(he, rel=1e-15)
    assert g.forward == pytest.approx(he, rel=1e-13)
    assert g.backward == pytest.approx(he, rel=1e-13)
    assert g.common_gain_chi_1 == pytest.approx(1.0, rel=1e-12)
    assert g.common_gain_phase == "edge of chaos"
    assert any("He et al. 2015" in n for n in g.notes)


def test_gains_to_dict():
    d = gains(activation("tanh")).to_dict()
    assert set(d) == {"activation", "forward", "backward", "common_gain", "common_gain_sigma_w2",
                      "common_gain_chi_1", "common_gain_phase", "notes"}
    assert isinstance(d["notes"], list)


# ---------------------------------------------------------------------------------------------
# layers: fan-in and fan-out
# ---------------------------------------------------------------------------------------------
def test_dense_layer_fans():
    # Glorot & Bengio 2010: fan_in = inputs, fan_out = outputs of a dense layer
    layer = Layer.dense(784, 256)
    assert (layer.fan_in, layer.fan_out, layer.kind) == (784, 256, "dense")
    assert layer.weight_shape == (256, 784)
    assert layer.kernel_size == ()


@pytest.mark.parametrize("cin,cout,kernel,k", [
    (3, 64, (3, 3), 9), (16, 32, 5, 5), (8, 8, (3, 3, 3), 27), (4, 2, (1, 7), 7)])
def test_conv_layer_fans(cin, cout, kernel, k):
    # He et al. 2015, section 2.2: a convolution's forward fan is n = k^2 c (kernel area times
    # input channels), the backward one k^2 d (output channels); Glorot & Bengio 2010 likewise.
    layer = Layer.conv(cin, cout, kernel)
    assert layer.fan_in == cin * k
    assert layer.fan_out == cout * k
    ks = (kernel,) if isinstance(kernel, int) else tuple(kernel)
    assert layer.kernel_size == ks
    assert layer.weight_shape == (cout, cin, *ks)
    assert (layer.out_features, layer.in_features) == (cout, cin * k)  # the 2-D reshaped weight
    d = layer.to_dict()
    assert d["kind"] == "conv" and d["weight_shape"] == [cout, cin, *ks]


# ---------------------------------------------------------------------------------------------
# per-layer numbers
# ---------------------------------------------------------------------------------------------
WIDTHS = [20, 64, 64, 48, 10]
CONVS = [Layer.conv(3, 16, (3, 3)), Layer.conv(16, 16, (3, 3)), Layer.conv(16, 32, 5),
         Layer.dense(32, 10), Layer.dense(10, 40)]


@pytest.fixture(scope="module")
def tanh_plans():
    act = activation("tanh")
    return {dist: recommend(act, widths=WIDTHS, distribution=dist)
            for dist in ("normal", "uniform", "truncated_normal", "orthogonal")}


def test_plan_per_layer_std_and_bias(tanh_plans):
    plan = tanh_plans["normal"]
    assert isinstance(plan, InitPlan) and plan.depth == len(WIDTHS) - 1
    for li, (a, b) in zip(plan.layers, zip(WIDTHS[:-1], WIDTHS[1:])):
        assert isinstance(li, LayerInit)
        assert (li.layer.fan_in, li.layer.fan_out) == (a, b)
        # W_ij ~ N(0, sigma_w2 / fan_in) (Poole et al. 2016 convention)
        assert li.weight_std == pytest.approx(math.sqrt(li.sigma_w2 / a), rel=1e-15)
        assert li.gain == pytest.approx(math.sqrt(li.sigma_w2), rel=1e-15)
        assert li.bias_std == pytest.approx(math.sqrt(li.sigma_b2), rel=1e-15)
        assert li.sigma_b2 == plan.sigma_b2
        assert li.value == li.weight_std
    for li in plan.layers[1:]:
        assert li.sigma_w2 == plan.sigma_w2
    # layer 1 reads data of mean square q_input = 1: q_1 = sigma_w2_1 * 1 + sigma_b2 = q*
    # (Poole et al. 2016, eq. 3 applied to the input layer)
    first = plan.layers[0]
    assert first.sigma_w2 + first.sigma_b2 == pytest.approx(plan.q_star, rel=1e-12)


def test_uniform_bound(tanh_plans):
    # U(-a, a) has variance a^2 / 3 (closed form), so a = sqrt(3) std; checked also by seeded
    # numpy sampling (2e6 draws, relative standard error of the variance ~1e-3).
    rng = np.random.default_rng(20240601)
    for li in tanh_plans["uniform"].layers:
        a = li.uniform_bound
        assert a == pytest.approx(math.sqrt(3) * li.weight_std, rel=1e-15)
        assert a * a / 3 == pytest.approx(li.weight_std**2, rel=1e-14)
        assert li.value == a
    a = tanh_plans["uniform"].layers[1].uniform_bound
    sample = rng.uniform(-a, a, 2_000_000)
    assert sample.var() == pytest.approx(tanh_plans["uniform"].layers[1].weight_std ** 2, rel=5e-3)


def test_truncated_normal_std(tanh_plans):
    # The std before truncation at +-2 std is chosen so that the truncated law has the planned
    # variance: scipy.stats.truncnorm(-2, 2, scale=s).var() == sigma_w2 / fan_in.
    assert TRUNCATION == 2.0
    assert truncated_normal_factor() == pytest.approx(stats.truncnorm(-2, 2).std(), rel=1e-14)
    for li in tanh_plans["truncated_normal"].layers:
        s = li.truncated_normal_std
        assert li.value == s
        assert stats.truncnorm(-2, 2, scale=s).var() == pytest.approx(li.weight_std**2, rel=1e-13)
    # and by seeded sampling: draw N(0, s^2), keep |w| <= 2 s, measure the variance
    li = tanh_plans["truncated_normal"].layers[1]
    rng = np.random.default_rng(7)
    w = rng.normal(0.0, li.truncated_normal_std, 3_000_000)
    w = w[np.abs(w) <= 2 * li.truncated_normal_std]
    assert w.var() == pytest.approx(li.weight_std**2, rel=5e-3)


def _semi_orthogonal(rows, cols, seed):
    # scipy.stats.ortho_group: Haar-random orthogonal matrix; a rows x cols block of it has
    # orthonormal rows (rows <= cols) or orthonormal columns (rows > cols)
    q = stats.ortho_group.rvs(max(rows, cols), random_state=seed)
    return q[:rows, :cols]


@pytest.mark.parametrize("layers", [
    [Layer.dense(32, 32), Layer.dense(32, 32)],        # square
    [Layer.dense(20, 64), Layer.dense(64, 48)],        # wide then tall
    [Layer.dense(64, 20), Layer.dense(20, 50)],        # tall then wide
    CONVS,                                             # conv weights reshaped to 2-D
], ids=["square", "wide-tall", "tall-wide", "conv"])
def test_orthogonal_scale(layers):
    # A scaled (semi-)orthogonal W must have the same second moment as the normal law it
    # replaces: mean squared row norm sigma_w2, i.e. mean(W^2) = sigma_w2 / fan_in; for
    # rows <= cols every row has squared norm sigma_w2 exactly.
    plan = recommend(activation("tanh"), layers=layers, distribution="orthogonal")
    for k, li in enumerate(plan.layers):
        rows, cols = li.layer.out_features, li.layer.in_features
        w = li.orthogonal_scale * _semi_orthogonal(rows, cols, seed=100 + k)
        row_norms = np.sum(w * w, axis=1)
        assert row_norms.mean() == pytest.approx(li.sigma_w2, rel=1e-12)
        assert np.mean(w * w) == pytest.approx(li.sigma_w2 / li.layer.fan_in, rel=1e-12)
        if rows <= cols:
            assert_allclose(row_norms, li.sigma_w2, rtol=1e-12)
        assert li.value == li.orthogonal_scale


def test_conv_plan_uses_kernel_fan_in():
    plan = recommend(activation("relu"), layers=CONVS, distribution="normal")
    for li, layer in zip(plan.layers, CONVS):
        assert li.layer is layer
        assert li.weight_std == pytest.approx(math.sqrt(li.sigma_w2 / layer.fan_in), rel=1e-15)
    assert plan.layers[0].layer.fan_in == 27  # 3 channels x 3 x 3


def test_depth_only_plan_has_gains_but_no_sizes():
    plan = recommend(activation("tanh"), depth=7)
    assert len(plan.layers) == 7
    for li in plan.layers:
        assert li.layer is None
        assert li.weight_std is None and li.uniform_bound is None and li.value is None
        assert li.gain == pytest.approx(math.sqrt(li.sigma_w2), rel=1e-15)
    assert plan.to_dict()["layers"][0]["kind"] is None


# ---------------------------------------------------------------------------------------------
# targets
# ---------------------------------------------------------------------------------------------
def test_edge_target_tanh_at_q1():
    # Edge-of-chaos line (Poole et al. 2016; Schoenholz et al. 2017):
    # sigma_w2 = 1 / E[tanh'(z)^2], sigma_b2 = 1 - sigma_w2 E[tanh(z)^2], by mpmath.
    plan = recommend(activation("tanh"), depth=10, target="edge")
    sw = 1 / mp_gauss(lambda x: mp.sech(x) ** 4)
    sb = 1 - sw * mp_m2("tanh")
    assert plan.sigma_w2 == pytest.approx(float(sw), rel=1e-12)
    assert plan.sigma_b2 == pytest.approx(float(sb), rel=1e-11)
    assert plan.q_star == pytest.approx(1.0, rel=1e-12)
    assert plan.propagation.phase == "edge of chaos"
    assert plan.propagation.chi_1 == pytest.approx(1.0, abs=1e-9)
    # attracting: V'(q*) < 1, by mpmath.diff of the quadrature in q
    assert float(mp_chi_q("tanh", 1, sw)) < 1
    assert plan.depth_ok


def test_edge_target_with_a_chosen_q_star():
    plan = recommend(activation("erf"), depth=10, target="edge", q_star=2.0)
    assert plan.q_star == pytest.approx(2.0, rel=1e-12)
    # Poole et al. 2016: chi_1 = 1 and V(q*) = q* at (sigma_w2, sigma_b2), by mpmath
    d = mp_dphi("erf")
    assert float(plan.sigma_w2 * mp_gauss(lambda x: d(x) ** 2, 2)) == pytest.approx(1, rel=1e-11)
    assert float(mp_V("erf", 2, plan.sigma_w2, plan.sigma_b2)) == pytest.approx(2, rel=1e-11)


def test_variance_target():
    # variance-preserving: sigma_b2 = 0 and V(1) = 1, i.e. sigma_w2 = 1 / E[phi(z)^2]
    for name in ("tanh", "gelu", "relu"):
        plan = recommend(activation(name), depth=5, target="variance")
        assert plan.target == "variance"
        assert plan.sigma_b2 == 0.0
        assert plan.sigma_w2 == pytest.approx(float(1 / mp_m2(name)), rel=1e-12)
        assert plan.q_star == pytest.approx(1.0, rel=1e-10)


@pytest.mark.parametrize("sb", [0.05, 0.3])
def test_fixed_bias_target(sb):
    # edge of chaos at a given sigma_b2: at the plan's (sigma_w2, q*) both V(q*) = q*
    # (Poole et al. 2016, eq. 3) and chi_1 = 1 (Schoenholz et al. 2017, eq. 8), by mpmath
    plan = recommend(activation("tanh"), depth=10, sigma_b2=sb)
    assert plan.target == "bias"
    assert plan.sigma_b2 == pytest.approx(sb, rel=1e-13)
    q, sw = plan.q_star, plan.sigma_w2
    assert float(mp_V("tanh", q, sw, sb)) == pytest.approx(q, rel=1e-10)
    assert float(sw * mp_gauss(lambda x: mp.sech(x) ** 4, q)) == pytest.approx(1.0, rel=1e-10)
    assert plan.propagation.phase == "edge of chaos"


def test_auto_target():
    act = activation("tanh")
    # with sigma_b2 given, "auto" means "bias"; without, the edge of chaos at q* = 1
    assert recommend(act, depth=4, sigma_b2=0.1).target == "bias"
    auto = recommend(act, depth=4)
    edge = recommend(act, depth=4, target="edge")
    assert (auto.sigma_w2, auto.sigma_b2, auto.q_star) == (edge.sigma_w2, edge.sigma_b2,
                                                           edge.q_star)
    # no attracting edge point (step jumps: chi_1 is infinite) -> falls back to "variance"
    step = recommend(activation("step"), depth=4)
    assert step.target == "variance"
    assert step.sigma_w2 == pytest.approx(2.0, rel=1e-13)  # 1 / E[step(z)^2] = 2 (closed form)


def test_auto_target_reports_what_was_aimed_at():
    assert recommend(activation("tanh"), depth=4).target == "edge"


@pytest.mark.parametrize("name", ["gelu", "silu"])
def test_gelu_and_silu_edge_plans_move_to_an_attracting_q_star(name):
    act = activation(name)
    # Why they move: at q* = 1 the edge point repels, V'(1) > 1 (mpmath, on the line
    # sigma_w2 = 1 / E[phi'(z)^2] of Poole et al. 2016).
    sw1 = 1 / mp_d2(name, 1)
    assert float(mp_chi_q(name, 1, sw1)) > 1
    plan = recommend(act, depth=30, target="edge")
    assert plan.q_star != pytest.approx(1.0, rel=1e-3)
    assert any("moved along the edge of chaos" in n for n in plan.notes)
    q, sw, sb = plan.q_star, plan.sigma_w2, plan.sigma_b2
    assert sb > 0
    # at the planned point: V(q*) = q*, chi_1 = 1 and V'(q*) < 1, all by mpmath
    assert float(mp_V(name, q, sw, sb)) == pytest.approx(q, rel=1e-10)
    assert float(sw * mp_d2(name, q)) == pytest.approx(1.0, rel=1e-10)
    assert float(mp_chi_q(name, q, sw)) < 1
    assert plan.propagation.variance_fixed_points.reached.stable
    assert plan.depth_ok


# ---------------------------------------------------------------------------------------------
# verdicts
# ---------------------------------------------------------------------------------------------
def test_verdict_beyond_six_xi_c_chaotic():
    # tanh, variance target: sigma_w2 = 1 / E[tanh(z)^2], sigma_b2 = 0, q* = 1. tanh is odd and
    # sigma_b2 = 0, so C(0) = 0: c* = 0 and chi_c = C'(0) = sigma_w2 E[tanh'(z)]^2 (Poole et al.
    # 2016, eq. 5 with independent u1, u2); xi_c = -1 / ln chi_c (Schoenholz et al. 2017, eq. 9)
    sw = 1 / mp_m2("tanh")
    chi_c = sw * mp_gauss(lambda x: mp.sech(x) ** 2) ** 2
    xi_c = float(-1 / mp.log(chi_c))
    plan = recommend(activation("tanh"), depth=1000, target="variance")
    p = plan.propagation
    assert p.phase == "chaotic"
    assert p.c_star == pytest.approx(0.0, abs=1e-12)
    assert p.xi_c == pytest.approx(xi_c, rel=1e-9)
    assert plan.trainable_depth == pytest.approx(6 * xi_c, rel=1e-9)  # Schoenholz et al. 2017
    assert not plan.depth_ok
    v = plan.verdict.summary
    assert "1000 layers exceeds" in v and f"{6 * xi_c:.0f} layers" in v
    assert "6 xi_c" in v and "chaotic" in v and "explode" in v
    assert "Schoenholz et al. 2017" in v


def test_verdict_beyond_six_xi_c_ordered():
    # sigmoid, variance target: ordered, c* = 1, chi_c = chi_1 = sigma_w2 E[sigmoid'(z)^2]
    # (Schoenholz et al. 2017, eqs. 8-9), by mpmath
    sw = 1 / mp_m2("sigmoid")
    chi1 = sw * mp_d2("sigmoid")
    xi_c = float(-1 / mp.log(chi1))
    plan = recommend(activation("sigmoid"), depth=10, target="variance")
    assert plan.propagation.phase == "ordered"
    assert plan.trainable_depth == pytest.approx(6 * xi_c, rel=1e-9)
    assert not plan.depth_ok
    assert "10 layers exceeds" in plan.verdict.summary and "vanish" in str(plan.verdict)
    assert plan.propagation.gradient_growth == pytest.approx(float(chi1) ** 10, rel=1e-8)


def test_verdict_within_the_limit():
    plan = recommend(activation("sigmoid"), depth=2, target="variance")
    assert plan.depth_ok and "within the predicted trainable depth" in plan.verdict.summary


def test_verdict_for_an_exploding_variance():
    # GELU at sigma_b2 = 0: the critical point is the q* -> 0 end of the line, sigma_w2 =
    # 1 / gelu'(0)^2 = 4 (gelu'(0) = Phi(0) = 1/2, closed form); from unit inputs the variance
    # grows by lim V(q)/q = 4 E[relu(z)^2] = 2 per layer (gelu ~ relu for large |x|).
    plan = recommend(activation("gelu"), depth=64, sigma_b2=0.0)
    assert plan.sigma_w2 == pytest.approx(4.0, rel=1e-9)
    assert plan.propagation.phase == "unbounded variance"
    assert plan.propagation.variance_fixed_points.growth_rate == pytest.approx(2.0, rel=1e-6)
    assert not plan.depth_ok and "explodes" in plan.verdict.summary


def test_plan_to_dict_fields():
    plan = recommend(activation("tanh"), widths=[4, 8, 2])
    d = plan.to_dict()
    assert set(d) == {"activation", "target", "target_description", "distribution", "sigma_w2",
                      "sigma_b2", "q_star", "depth", "trainable_depth", "depth_ok", "verdict",
                      "layers", "propagation", "notes", "loss", "n_classes", "batch_size",
                      "learning_rate_ceiling", "learning_rate", "learning_rate_details",
                      "output_layer", "output_layer_scale"}
    assert len(d["layers"]) == 2 and d["layers"][0]["fan_in"] == 4
    assert d["propagation"] == plan.propagation.to_dict()


# ---------------------------------------------------------------------------------------------
# bad inputs
# ---------------------------------------------------------------------------------------------
T = activation("tanh")


@pytest.mark.parametrize("kwargs,field,pattern", [
    (dict(depth=3, distribution="gaussian"), "distribution",
     r"distribution must be one of normal, uniform, truncated_normal, orthogonal, got 'gaussian'"),
    (dict(depth=3, distribution=None), "distribution", r"distribution must be one of .*got None"),
    (dict(depth=3, target="critical"), "target",
     r"target must be one of auto, edge, variance, bias, got 'critical'"),
    (dict(widths=[5]), "widths", r"widths must be a list of at least 2 sizes, got \[5\]"),
    (dict(widths=[]), "widths", r"widths must be a list of at least 2 sizes, got \[\]"),
    (dict(widths=[10, -3, 4]), "widths[1]", r"widths\[1\] must be an integer >= 1, got -3"),
    (dict(widths=[10, 0]), "widths[1]", r"widths\[1\] must be an integer >= 1, got 0"),
    (dict(widths=[10, 2.5]), "widths[1]", r"widths\[1\] must be an integer >= 1, got 2.5"),
    (dict(depth=5, widths=[10, 20, 30]), "depth",
     r"depth must be equal to the number of layers \(2\), got 5"),
    (dict(depth=-2), "depth", r"depth must be an integer >= 1, got -2"),
    (dict(depth=0), "depth", r"depth must be an integer >= 1, got 0"),
    (dict(depth=2.5), "depth", r"depth must be an integer >= 1, got 2.5"),
    (dict(depth=True), "depth", r"depth must be an integer >= 1, got True"),
    (dict(), "depth", r"depth must be given when neither widths nor layers are; it is missing"),
    (dict(widths=[2, 3], layers=[Layer.dense(2, 3)]), "widths",
     r"widths must be absent when layers are given"),
    (dict(layers=[]), "layers", r"layers must be a non-empty list, got \[\]"),
    (dict(layers=[(3, 4)]), "layers[0]", r"layers\[0\] must be a Layer, got \(3, 4\)"),
    (dict(depth=3, sigma_b2=-1.0), "sigma_b2", r"sigma_b2 must be >= 0, got -1.0"),
    (dict(depth=3, sigma_b2=math.nan), "sigma_b2", r"sigma_b2 must be a finite real number"),
    (dict(depth=3, target="edge", sigma_b2=0.1), "sigma_b2",
     r"sigma_b2 must be absent for target 'edge'"),
    (dict(depth=3, target="bias"), "sigma_b2", r"sigma_b2 must be given for target 'bias'"),
    (dict(depth=3, q_star=-1.0), "q_star", r"q_star must be > 0, got -1.0"),
    (dict(depth=3, q_input=0.0), "q_input", r"q_input must be > 0, got 0.0"),
])
def test_bad_inputs_raise_clear_errors(kwargs, field, pattern):
    with pytest.raises(InvalidParameterError, match=pattern) as info:
        recommend(T, **kwargs)
    assert info.value.field == field


@pytest.mark.parametrize("make,pattern", [
    (lambda: Layer.dense(-3, 4), r"in_features must be an integer >= 1, got -3"),
    (lambda: Layer.dense(3, 0), r"out_features must be an integer >= 1, got 0"),
    (lambda: Layer.conv(-3, 4, 3), r"in_channels must be an integer >= 1, got -3"),
    (lambda: Layer.conv(3, 0, 3), r"out_channels must be an integer >= 1, got 0"),
    (lambda: Layer.conv(3, 4, 0), r"kernel_size must be an integer >= 1, got 0"),
    (lambda: Layer.conv(3, 4, (3, -1)), r"kernel_size must be an integer >= 1, got -1"),
    (lambda: Layer.conv(3, 4, ()), r"kernel_size must be a positive int or a non-empty list"),
])
def test_bad_layer_sizes(make, pattern):
    with pytest.raises(InvalidParameterError, match=pattern):
        make()


def test_no_attracting_edge_is_a_computation_error():
    # step jumps: there is no edge of chaos at all (chi_1 is infinite)
    with pytest.raises(ComputationError, match="no attracting point on the edge of chaos"):
        recommend(activation("step"), depth=3, target="edge")
    # ReLU's edge-of-chaos line is sigma_b2 = 0 for every q* (sigma_w2 = 2): none at 0.5
    with pytest.raises(ComputationError, match="no edge-of-chaos point of relu has sigma_b2 = 0.5"):
        recommend(activation("relu"), depth=3, sigma_b2=0.5)


def test_numpy_integers_are_accepted():
    assert recommend(T, depth=np.int64(3)).depth == 3
    assert recommend(T, widths=np.array([4, 8, 2])).depth == 2


def test_an_integral_float_kernel_size_is_read_as_the_integer():
    # decided: 3.0 is the integer 3 (as numpy integers are); 3.5 is refused naming kernel_size
    layer = Layer.conv(3, 4, 3.0)
    assert (layer.fan_in, layer.fan_out, layer.kernel_size) == (9, 12, (3,))
    with pytest.raises(InvalidParameterError, match="kernel_size"):
        Layer.conv(3, 4, 3.5)


def test_widths_as_a_string_names_the_list():
    with pytest.raises(InvalidParameterError, match=r"^widths must"):
        recommend(T, widths="10,20")


@pytest.mark.parametrize("call", [lambda a: recommend(a, depth=3), lambda a: gains(a),
                                  lambda a: propagation(a, 1.0, 0.0)],
                         ids=["recommend", "gains", "propagation"])
def test_a_name_instead_of_an_activation(call):
    # decided: a name is resolved once at the boundary, the same answer as the Activation's
    assert call("tanh").to_dict() == call(activation("tanh")).to_dict()


def test_hard_tanh_without_bias_has_no_positive_fixed_point():
    # hard_tanh(x)^2 < x^2 whenever |x| > 1, so V(q) = E[hard_tanh(sqrt(q) z)^2] < q for every
    # q > 0 at sigma_w2 = 1, sigma_b2 = 0 (closed-form inequality; mpmath gives
    # V(q) - q = -5.7e-28 at q = 0.0089): the only fixed point is q* = 0.
    plan = recommend(activation("hard_tanh"), widths=[7, 30, 5], sigma_b2=0.0)
    points = plan.propagation.variance_fixed_points.points
    assert [p.q for p in points] == [0.0]
    assert plan.q_star == 0.0


def test_absurd_depth_is_refused_clearly():
    # (only the instantly failing size is exercised here; a depth of 1e9 would exhaust memory)
    with pytest.raises(InvalidParameterError, match=r"^depth must be an integer <= "):
        recommend(T, depth=10**20)
