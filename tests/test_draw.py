"""Tests of propcalc.init.draw: arrays drawn from an initialisation plan.

Sampling tolerances. For n independent draws w_i with mean 0, variance s^2
and kurtosis k, the mean square m = mean(w_i^2) has mean s^2 and variance
s^4 (k - 1) / n (the variance of a sample second moment about a known mean,
Kendall & Stuart, The Advanced Theory of Statistics vol. 1, section 10.5;
for a normal law k = 3 and n m / s^2 ~ chi^2_n, so the relative standard
error is sqrt(2 / n)). Every check allows 5 standard errors (a two-sided
normal tail of 5.7e-7; the seeds are fixed, so the tests are deterministic
anyway). Kurtosis: 3 for the normal, 9/5 for the uniform (closed form), and
scipy.stats.truncnorm's for the normal truncated at +-2 (reference library).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

import propcalc
from propcalc import InvalidParameterError, Layer, recommend
from propcalc.init.draw import (
    BIAS_DISTRIBUTIONS,
    PlanArrays,
    draw_layer,
    draw_plan,
    semi_orthogonal,
    truncated_normal,
)
from propcalc.init.layers import TRUNCATION, truncated_normal_factor

TANH = propcalc.activation("tanh")
LAYERS = [Layer.dense(200, 500), Layer.dense(500, 300), Layer.conv(16, 32, (3, 3)),
          Layer.conv(32, 8, 5)]

# excess kurtosis + 3 of each law (see the module docstring for the sources)
KURTOSIS = {
    "normal": 3.0,
    "uniform": 9.0 / 5.0,
    "truncated_normal": 3.0 + float(stats.truncnorm.stats(-TRUNCATION, TRUNCATION, moments="k")),
}


def plan_for(distribution: str, layers=LAYERS, **kw):
    return recommend(TANH, layers=layers, distribution=distribution, **kw)


def assert_mean_square(values: np.ndarray, variance: float, kurtosis: float, what: str) -> None:
    n = values.size
    m = float(np.mean(values ** 2))
    se = math.sqrt((kurtosis - 1.0) / n)  # relative standard error of the mean square
    assert abs(m / variance - 1.0) <= 5.0 * se, (what, m, variance, se)
    # the mean: standard error s / sqrt(n)
    assert abs(float(np.mean(values))) <= 5.0 * math.sqrt(variance / n), what


@pytest.mark.parametrize("distribution", ["normal", "uniform", "truncated_normal"])
def test_weights_have_the_planned_variance(distribution):
    plan = plan_for(distribution)
    arrays = draw_plan(plan, seed=11)
    assert isinstance(arrays, PlanArrays)
    for init, la in zip(plan.layers, arrays.layers):
        assert la.weight.shape == init.layer.weight_shape
        assert la.weight.dtype == np.float64
        var = init.sigma_w2 / init.layer.fan_in  # W_ij ~ (0, sigma_w2 / fan_in), the convention
        assert la.weight_std == pytest.approx(math.sqrt(var), rel=1e-15)
        assert_mean_square(la.weight, var, KURTOSIS[distribution], f"layer {init.index}")


@pytest.mark.parametrize("distribution, law", [
    ("normal", stats.norm), ("uniform", None), ("truncated_normal", None)])
def test_weight_law_by_kolmogorov_smirnov(distribution, law):
    # the law itself, against scipy.stats (reference library); seeded, so deterministic
    plan = plan_for(distribution, layers=[Layer.dense(400, 500)])
    w = draw_plan(plan, seed=3).layers[0].weight.ravel()
    init = plan.layers[0]
    if distribution == "normal":
        ref = stats.norm(scale=init.weight_std)
    elif distribution == "uniform":
        a = init.uniform_bound
        ref = stats.uniform(loc=-a, scale=2 * a)
        assert np.max(np.abs(w)) <= a
    else:
        s = init.truncated_normal_std
        ref = stats.truncnorm(-TRUNCATION, TRUNCATION, scale=s)
        assert np.max(np.abs(w)) <= TRUNCATION * s
        # the pre-truncation std makes the truncated law's std the planned one
        assert ref.std() == pytest.approx(init.weight_std, rel=1e-12)
    assert stats.kstest(w, ref.cdf).pvalue > 1e-3


@pytest.mark.parametrize("rows, cols", [(500, 200), (200, 500), (256, 256), (32, 144)])
def test_semi_orthogonal_rows_or_columns(rows, cols):
    q = semi_orthogonal(rows, cols, np.random.default_rng(0))
    assert q.shape == (rows, cols)
    gram = q @ q.T if rows <= cols else q.T @ q
    np.testing.assert_allclose(gram, np.eye(min(rows, cols)), atol=1e-12)


def test_semi_orthogonal_is_haar_distributed():
    # Mezzadri 2007, section 5: without moving the signs of R's diagonal into Q the
    # law is not Haar (numpy's Householder QR then gives E[Q_00] = -0.5 for 3x3);
    # under the Haar law E[Q_00] = 0 with variance 1/3 (each column is uniform on the sphere)
    rng = np.random.default_rng(5)
    draws = np.array([semi_orthogonal(3, 3, rng)[0, 0] for _ in range(6000)])
    assert abs(draws.mean()) <= 5.0 * math.sqrt(1.0 / 3.0 / draws.size)
    assert draws.var() == pytest.approx(1.0 / 3.0, rel=5.0 * math.sqrt(0.8 / draws.size) * 3)


def test_orthogonal_weights_are_scaled_for_every_shape():
    plan = plan_for("orthogonal")
    arrays = draw_plan(plan, seed=2)
    for init, la in zip(plan.layers, arrays.layers):
        layer = init.layer
        m = la.weight.reshape(layer.out_features, -1)  # conv weights as (out, in * k)
        rows, cols = m.shape
        assert (rows, cols) == (layer.out_features, layer.in_features)
        scale2 = init.orthogonal_scale ** 2
        gram = m @ m.T if rows <= cols else m.T @ m
        np.testing.assert_allclose(gram / scale2, np.eye(min(rows, cols)), atol=1e-12)
        # every entry has mean square sigma_w2 / fan_in exactly: trace identity, not sampling
        assert float(np.mean(la.weight ** 2)) == pytest.approx(init.sigma_w2 / layer.fan_in,
                                                                rel=1e-12)


def test_truncated_normal_rejection_sampler():
    rng = np.random.default_rng(9)
    x = truncated_normal((200_000,), 2.0, rng)
    assert np.max(np.abs(x)) <= 4.0
    # JKB 1994 eq. 13.134 through truncated_normal_factor, and scipy.stats.truncnorm
    var = (2.0 * truncated_normal_factor()) ** 2
    assert var == pytest.approx(stats.truncnorm(-2, 2, scale=2.0).var(), rel=1e-12)
    assert_mean_square(x, var, KURTOSIS["truncated_normal"], "truncated normal")


@pytest.mark.parametrize("law", ["normal", "uniform", "truncated_normal"])
def test_biases_have_the_planned_variance(law):
    plan = plan_for("normal", layers=[Layer.dense(10, 20000)])
    la = draw_plan(plan, seed=4, bias_distribution=law).layers[0]
    assert la.bias.shape == (20000,)
    assert la.bias_distribution == law
    assert_mean_square(la.bias, plan.sigma_b2, KURTOSIS[law], f"bias {law}")


def test_bias_follows_the_plan_law_on_request():
    plan = plan_for("uniform", layers=[Layer.dense(10, 5000)])
    la = draw_plan(plan, seed=4, bias_distribution="plan").layers[0]
    assert la.bias_distribution == "uniform"
    assert np.max(np.abs(la.bias)) <= math.sqrt(3.0 * plan.sigma_b2)
    orth = draw_plan(plan_for("orthogonal"), seed=1, bias_distribution="plan")
    assert orth.bias_distribution == "normal"


def test_zero_bias_variance_gives_zero_biases():
    plan = recommend(propcalc.activation("relu"), widths=[5, 7, 3], target="variance")
    assert plan.sigma_b2 == 0.0
    for la in draw_plan(plan, seed=0).layers:
        assert np.all(la.bias == 0.0)


def test_same_seed_same_arrays_and_streams_are_per_layer():
    plan = plan_for("normal")
    a, b = draw_plan(plan, seed=123), draw_plan(plan, seed=123)
    for x, y in zip(a.layers, b.layers):
        assert x.weight.tobytes() == y.weight.tobytes()
        assert x.bias.tobytes() == y.bias.tobytes()
    c = draw_plan(plan, seed=124)
    assert not np.array_equal(a.layers[0].weight, c.layers[0].weight)
    # changing layer 2's shape leaves layer 1's arrays unchanged (one stream per layer)
    other = plan_for("normal", layers=[LAYERS[0], Layer.dense(500, 50), *LAYERS[2:3]])
    d = draw_plan(other, seed=123)
    assert d.layers[0].weight.tobytes() == a.layers[0].weight.tobytes()
    assert a.seed_entropy == 123


def test_generator_seed_is_consumed_in_order():
    plan = plan_for("normal", layers=LAYERS[:2])
    a = draw_plan(plan, seed=np.random.default_rng(7))
    b = draw_plan(plan, seed=np.random.default_rng(7))
    assert a.seed_entropy is None
    assert np.array_equal(a.layers[1].weight, b.layers[1].weight)


def test_fresh_entropy_is_recorded_and_reproduces():
    plan = plan_for("normal", layers=LAYERS[:1])
    a = draw_plan(plan)
    b = draw_plan(plan, seed=np.random.SeedSequence(a.seed_entropy))
    assert np.array_equal(a.layers[0].weight, b.layers[0].weight)


def test_depth_only_plan_needs_shapes():
    plan = recommend(TANH, depth=2)
    with pytest.raises(InvalidParameterError, match=r"layers\[0\] must be a known Layer shape"):
        draw_plan(plan, seed=0)
    arrays = draw_plan(plan, seed=0, layers=[Layer.dense(4, 6), Layer.dense(6, 2)])
    assert [la.weight.shape for la in arrays.layers] == [(6, 4), (2, 6)]


def test_shapes_that_disagree_with_the_plan_are_refused():
    plan = plan_for("normal", layers=LAYERS[:2])
    with pytest.raises(InvalidParameterError, match=r"layers\[1\] must be the plan's layer 2"):
        draw_plan(plan, seed=0, layers=[LAYERS[0], Layer.dense(500, 301)])
    with pytest.raises(InvalidParameterError, match="a list of 2 Layers"):
        draw_plan(plan, seed=0, layers=[LAYERS[0]])


@pytest.mark.parametrize("seed", [-1, 1.5, "7", True])
def test_bad_seeds(seed):
    with pytest.raises(InvalidParameterError, match="seed must be"):
        draw_plan(plan_for("normal", layers=LAYERS[:1]), seed=seed)


def test_bad_laws_and_inputs():
    plan = plan_for("normal", layers=LAYERS[:1])
    with pytest.raises(InvalidParameterError, match="bias_distribution must be one of"):
        draw_plan(plan, seed=0, bias_distribution="laplace")
    with pytest.raises(InvalidParameterError, match="distribution must be one of"):
        draw_layer(plan.layers[0], "cauchy", np.random.default_rng(0))
    with pytest.raises(InvalidParameterError, match="plan must be an InitPlan"):
        draw_plan({"layers": []}, seed=0)  # type: ignore[arg-type]
    assert "plan" in BIAS_DISTRIBUTIONS


def test_to_dict_reports_planned_and_sampled_std():
    plan = plan_for("orthogonal", layers=LAYERS[:1])
    d = draw_plan(plan, seed=0).to_dict()
    layer = d["layers"][0]
    assert layer["weight_shape"] == [500, 200]
    assert layer["sample_weight_std"] == pytest.approx(layer["weight_std"], rel=1e-12)
    assert propcalc.jsonable(d) == d
