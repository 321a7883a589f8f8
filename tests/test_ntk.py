"""The tangent kernel of a plain stack at initialisation (propcalc.training.ntk).

Sources: the arc-cosine kernels of Cho & Saul 2009 (closed forms of E[relu relu] and
E[relu' relu'] at correlation c) in the recursion of Jacot et al. 2018 (Theorem 1), written for the
standard parametrisation (Lee et al. 2019, appendix; Sohl-Dickstein et al. 2020, section 2);
seeded finite-width empirical kernels by torch autograd (a reference library, sampling error
bounds the tolerance).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from propcalc import PropcalcError
from propcalc.training import UnsupportedKernelError, tangent_kernel


def _arccos_relu(ws, sw, sb, q0, c0):
    """ReLU closed forms (Cho & Saul 2009, arc-cosine kernels of degree 1 and 0)."""
    c = np.asarray(c0, dtype=float)
    q = sw * q0 + sb
    k = sw * q0 * c + sb
    theta = ws[0] * q0 * c + 1.0
    for n in ws[1:-1]:
        cc = np.clip(k / q, -1.0, 1.0)
        th = np.arccos(cc)
        e_val = q * (np.sin(th) + (math.pi - th) * cc) / (2 * math.pi)   # degree-1 kernel
        e_der = (math.pi - th) / (2 * math.pi)                           # degree-0 kernel
        theta = n * e_val + 1.0 + sw * e_der * theta
        k = sw * e_val + sb
        q = sw * q / 2.0 + sb                                            # E[relu^2] = q / 2
    return theta


@pytest.mark.parametrize("sw,sb", [(2.0, 0.0), (1.7, 0.3)])
def test_relu_matches_arc_cosine_closed_form(sw, sb):
    ws = [10, 50, 60, 70, 3]
    c0 = np.array([1.0, 0.0, 0.5, -0.3, 0.99])
    k = tangent_kernel("relu", ws, sw, sb, 1.3, c0[1:])
    ref = _arccos_relu(ws, sw, sb, 1.3, c0)
    np.testing.assert_allclose(k.output_diagonal, ref[0], rtol=1e-11)
    np.testing.assert_allclose(k.output_off_diagonal, ref[1:], rtol=1e-9)


def test_per_layer_scales_and_no_bias():
    # biases=False removes 1 per layer: Theta^1 = d q0 c0 exactly (the input's inner product)
    k = tangent_kernel("tanh", [7, 5, 2], [0.5, 1.5], [0.0, 0.1], 2.0, 0.25, biases=False)
    assert k.diagonal[0] == pytest.approx(14.0, rel=1e-15)
    assert k.off_diagonal[0][0] == pytest.approx(3.5, rel=1e-15)
    assert k.q[0] == pytest.approx(1.0, rel=1e-15)


@pytest.mark.parametrize("kwargs,match", [
    ({"widths": [3]}, "widths must be a list of at least 2"),
    ({"widths": "34"}, "widths must be a list of integers"),
    ({"sigma_w2": [1.0]}, "sigma_w2 must be a number or a list of 2"),
    ({"sigma_w2": -1.0}, "sigma_w2 must be > 0"),
    ({"c0": 1.5}, r"c0 must be in \[-1, 1\]"),
    ({"q0": 0.0}, "q0 must be > 0"),
])
def test_bad_input_names_the_field(kwargs, match):
    args = {"act": "tanh", "widths": [3, 4, 2], "sigma_w2": 1.0}
    args.update(kwargs)
    with pytest.raises(PropcalcError, match=match):
        tangent_kernel(**args)


def test_jumping_activation_is_unsupported():
    with pytest.raises(UnsupportedKernelError, match="infinite"):
        tangent_kernel("step", [3, 4, 2], 1.0)


@pytest.mark.parametrize("name", ["gelu", "relu", "tanh", "swish"])
@pytest.mark.parametrize("q", [0.3, 1.0, 14.1, 200.0])
def test_pair_moments_are_the_engine_pair_expectations(name, q):
    # the two moments against the engine's separate pair expectations (each checked against
    # mpmath in tests/test_maps.py), at variances where E[phi phi] exceeds 1
    import propcalc
    from propcalc.meanfield.maps import derivative_pair_expectation, pair_expectation
    from propcalc.training.ntk import pair_moments
    act = propcalc.activation(name)
    c = np.array([1.0, 0.9, 0.5, 0.0, -0.4])
    e_val, e_der = pair_moments(act, c, q)
    np.testing.assert_allclose(e_val, pair_expectation(act, c, q), rtol=1e-10, atol=1e-14 * q)
    np.testing.assert_allclose(e_der, derivative_pair_expectation(act, c, q), rtol=1e-10,
                               atol=1e-14)


def test_relu_closed_form_at_a_large_variance():
    ws = [10, 50, 60, 3]
    c0 = np.array([1.0, 0.3])
    k = tangent_kernel("relu", ws, 2.0, 0.5, 12.0, c0[1:])
    ref = _arccos_relu(ws, 2.0, 0.5, 12.0, c0)
    np.testing.assert_allclose(k.output_diagonal, ref[0], rtol=1e-11)
    np.testing.assert_allclose(k.output_off_diagonal, ref[1:], rtol=1e-9)
