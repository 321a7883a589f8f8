"""The plot of the network correlation map before and after shaping."""

from __future__ import annotations

import math

import numpy as np
import pytest

import propcalc

pytest.importorskip("matplotlib")

from propcalc.output.plots import save_figure  # noqa: E402
from propcalc.output.shaping_plot import plot_shaping  # noqa: E402


def _arccos_relu(c):
    # normalised arc-cosine kernel of order 1 (Cho & Saul 2009)
    return (np.sqrt(1 - c * c) + (math.pi - np.arccos(c)) * c) / math.pi


def test_curves_are_the_network_maps():
    shaped = propcalc.shape_activation("relu", 40, target=0.8)
    fig = plot_shaping(shaped, n_points=21)
    left, right = fig.axes
    lines = {line.get_label(): line for line in left.get_lines()}
    after = [v for k, v in lines.items() if k.startswith("shaped")][0]
    before = [v for k, v in lines.items() if "edge of chaos" in k][0]
    c0 = np.linspace(0, 1, 21)
    want = c0.copy()
    for _ in range(40):
        want = _arccos_relu(want)  # ReLU at sigma_w2 = 2: the arc-cosine kernel composed
    np.testing.assert_allclose(before.get_ydata(), want, atol=1e-12)
    # the shaped curve against propcalc's maps, composed point by point
    got = np.empty(21)
    for i, c in enumerate(c0):
        for _ in range(40):
            c = float(propcalc.correlation_map(shaped.activation, c, 1.0, 0.0, 1.0))
        got[i] = c
    np.testing.assert_allclose(after.get_ydata(), got, atol=1e-12)
    assert after.get_ydata()[0] == pytest.approx(0.8, abs=1e-12)
    shaped_traj = [v for v in right.get_lines() if v.get_label() == "shaped"][0]
    np.testing.assert_allclose(shaped_traj.get_ydata(), shaped.correlations)


def test_same_bytes_for_the_same_call():
    shaped = propcalc.shape_activation("tanh", 20, method="dks")
    a = save_figure(plot_shaping(shaped, n_points=11), format="svg")
    b = save_figure(plot_shaping(shaped, n_points=11), format="svg")
    assert a == b and a.startswith(b"<?xml")


def test_bad_arguments():
    shaped = propcalc.shape_activation("relu", 20)
    with pytest.raises(propcalc.InvalidParameterError, match="n_points"):
        plot_shaping(shaped, n_points=2)
    with pytest.raises(propcalc.InvalidParameterError, match="shaped"):
        plot_shaping("relu")
