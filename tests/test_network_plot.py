"""propcalc.output.network_plot: q, c and the gradient against depth for a described network.

What is checked: the panels draw the numbers of :func:`propcalc.network_propagation` (the
lines' data are the result's sequences), log scales where the values span more than
LOG_RATIO and ``1 - c`` when the inputs come within NEAR_ONE of each other, the summary's
positions marked by vertical lines, simulated positions drawn with their bands, the same
bytes for the same call (PNG and SVG), and no matplotlib warnings (warnings are errors in the
pytest configuration). The PNG signature is that of the PNG specification (ISO/IEC
15948:2004, section 5.2).
"""

from __future__ import annotations

import numpy as np
import pytest

pytest.importorskip("matplotlib")

import propcalc  # noqa: E402
from propcalc.output import network_plot  # noqa: E402
from propcalc.output.plots import save_figure  # noqa: E402

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # ISO/IEC 15948:2004, section 5.2


def plain(times: int, act: str = "relu", sigma_w2: float = 2.0, sigma_b2: float = 0.0) -> dict:
    return {"blocks": [{"repeat": {"times": times, "blocks": [
        {"dense": {"sigma_w2": sigma_w2, "sigma_b2": sigma_b2}}, {"activation": act}]}}]}


RESNET = {"blocks": [{"dense": {"sigma_w2": 1.0, "sigma_b2": 0.0}},
                     {"repeat": {"times": 24, "blocks": [{"residual": {"branch": [
                         {"activation": "relu"}, {"dense": {"sigma_w2": 2.0, "sigma_b2": 0.0}}],
                         "weight": 1.0}}]}}]}
# relu after a residual sum: the stream is no longer Gaussian (positions simulated)
POST = {"blocks": [{"dense": {"sigma_w2": 1.0, "sigma_b2": 0.0}},
                   {"repeat": {"times": 4, "blocks": [
                       {"residual": {"branch": [{"dense": {"sigma_w2": 2.0, "sigma_b2": 0.0}}],
                                     "weight": 1.0}},
                       {"activation": "relu"}]}}]}


def lines_with(ax, prefix: str):
    return [ln for ln in ax.get_lines() if str(ln.get_label()).startswith(prefix)]


def test_panels_draw_the_result_numbers():
    r = propcalc.network_propagation(RESNET)
    fig = network_plot.plot_network(r)
    ax_q, ax_c, ax_g = fig.axes[:3]
    (q_line,) = lines_with(ax_q, "mean field")
    np.testing.assert_allclose(q_line.get_ydata(), r.q, rtol=0, atol=0)
    (c_line,) = lines_with(ax_c, "mean field")
    np.testing.assert_allclose(c_line.get_ydata(), r.c, rtol=0, atol=0)
    (g_line,) = lines_with(ax_g, "mean field")
    np.testing.assert_allclose(g_line.get_ydata(), r.gradient, rtol=0, atol=0)
    # q doubles per residual block (Yang & Schoenholz 2017: second moments add): log scale
    assert ax_q.get_yscale() == "log" and ax_g.get_yscale() == "log"
    assert ax_c.get_yscale() == "linear"


def test_marks_the_summary_positions():
    r = propcalc.network_propagation(RESNET)
    assert r.summary.gradient_beyond_at is not None
    fig = network_plot.plot_network(r)
    for ax in fig.axes[:3]:
        xs = [ln.get_xdata()[0] for ln in ax.get_lines() if ln.get_linestyle() == "--"
              and len(ln.get_xdata()) == 2 and ln.get_xdata()[0] == ln.get_xdata()[1]]
        assert r.summary.gradient_beyond_at in xs
    texts = [t.get_text() for leg in fig.legends for t in leg.get_texts()]
    assert any(f"position {r.summary.gradient_beyond_at}" in t for t in texts)


def test_merging_inputs_shown_as_one_minus_c_on_log_scale():
    # tanh in the ordered phase (sigma_w2 = 1, sigma_b2 = 0.3): c -> 1 exponentially
    # (Schoenholz et al. 2017), so 1 - c spans decades
    r = propcalc.network_propagation(plain(50, "tanh", 1.0, 0.3), c0=0.5)
    assert r.summary.indistinguishable_at is not None
    fig = network_plot.plot_network(r)
    ax_c = fig.axes[1]
    assert ax_c.get_yscale() == "log"
    (line,) = lines_with(ax_c, "mean field")
    np.testing.assert_allclose(line.get_ydata(), 1.0 - np.array(r.c), rtol=0, atol=0)
    texts = [t.get_text() for leg in fig.legends for t in leg.get_texts()]
    assert any("inputs indistinguishable" in t for t in texts)


def test_simulated_positions_with_bands():
    r = propcalc.network_propagation(POST)
    assert r.gaussian_positions < len(r.q) - 1
    fig = network_plot.plot_network(r)
    ax_q = fig.axes[0]
    (pts,) = lines_with(ax_q, "finite-width simulation")
    first = r.gaussian_positions + 1
    np.testing.assert_array_equal(pts.get_xdata(), np.arange(first, len(r.q)))
    np.testing.assert_allclose(pts.get_ydata(), r.q[first:], rtol=0, atol=0)
    assert ax_q.collections, "the band (+- 2 SE) is drawn"


def test_tokens_and_attention():
    block = lambda *branch: {"residual": {"branch": [{"norm": "layer"}, *branch],  # noqa: E731
                                          "weight": 1.0}}
    tf = {"blocks": [{"repeat": {"times": 3, "blocks": [
        block({"attention": {"tokens": 16, "heads": 2}}),
        block({"dense": {"sigma_w2": 2.0, "sigma_b2": 0.0}}, {"activation": "gelu"},
              {"dense": {"sigma_w2": 1.0, "sigma_b2": 0.0}})]}}]}
    r = propcalc.network_propagation(tf, c0=0.2, c0_within=0.1, c0_between=0.05)
    fig = network_plot.plot_network(r)
    (line,) = lines_with(fig.axes[1], "two positions (tokens) of one input")
    np.testing.assert_allclose(line.get_ydata(), r.c_within, rtol=0, atol=0)


@pytest.mark.parametrize("fmt", ["png", "svg"])
def test_same_bytes_for_the_same_call(fmt):
    r = propcalc.network_propagation(POST)
    a = save_figure(network_plot.plot_network(r), None, fmt)
    b = save_figure(network_plot.plot_network(r), None, fmt)
    assert a == b
    if fmt == "png":
        assert a.startswith(PNG_SIGNATURE)


def test_long_network_one_line_per_block_kind():
    # ReLU at sigma_w2 = 2: q = 2 after every dense block, 1 after every activation (He et al.
    # 2015); past SPLIT_POSITIONS the two kinds are separate lines instead of a zigzag
    r = propcalc.network_propagation(plain(1500), c0=0.0)
    assert len(r.q) - 1 > network_plot.SPLIT_POSITIONS
    fig = network_plot.plot_network(r)
    (dense,) = lines_with(fig.axes[0], "mean field, after dense blocks")
    (act,) = lines_with(fig.axes[0], "mean field, after activation blocks")
    np.testing.assert_array_equal(dense.get_xdata(), np.arange(1, 3001, 2))
    np.testing.assert_allclose(dense.get_ydata(), 2.0, rtol=1e-12)
    np.testing.assert_allclose(act.get_ydata(), 1.0, rtol=1e-12)
    data = save_figure(fig, None, "png")
    assert data.startswith(PNG_SIGNATURE)


def test_refuses_other_objects():
    with pytest.raises(propcalc.PropcalcError, match="result must be a NetworkPropagation"):
        network_plot.plot_network({"q": [1.0]})


def test_unknown_positions_without_simulation_are_named():
    r = propcalc.network_propagation(POST, simulate=False)
    first = r.gaussian_positions + 1
    assert r.q[first] is None
    fig = network_plot.plot_network(r)
    texts = [t.get_text() for leg in fig.legends for t in leg.get_texts()]
    assert f"not Gaussian from position {first}: no numbers (not simulated: see the notes)" in texts
    for fmt in ("png", "svg"):  # the hatched region renders without warnings
        assert save_figure(fig, None, fmt)
