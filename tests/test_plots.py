"""Tests of propcalc.output.plots: every figure renders, deterministically, with the user's marker.

Warnings are errors (pytest configuration and the explicit filter below), so
"no warnings" is part of every rendering check. Grids are kept small: the
figures' numbers come from the sweep and the maps, which have their own tests.
"""

from __future__ import annotations

import io
import re
import struct
import subprocess
import sys
import warnings

import numpy as np
import pytest

pytest.importorskip("matplotlib")

from matplotlib.figure import Figure  # noqa: E402
from matplotlib.lines import Line2D  # noqa: E402

import propcalc  # noqa: E402
from propcalc import InvalidParameterError  # noqa: E402
from propcalc.output.plots import (  # noqa: E402
    USER_POINT_GID,
    plot_correlation_map,
    plot_depth_scales,
    plot_phase_diagram,
    plot_variance_map,
    save_figure,
)
from propcalc.meanfield.sweep import sweep  # noqa: E402
from propcalc.numerics.quadrature import DEFAULT_RULE  # noqa: E402
from propcalc.output.phase_plot import edge_line_parts  # noqa: E402
from propcalc.output.phase_regions import BISECTION_STEPS, locate_regions  # noqa: E402

TANH = propcalc.activation("tanh")
SMALL = dict(n_grid=(9, 7))


def user_markers(fig: Figure) -> list[Line2D]:
    return [ln for ax in fig.axes for ln in ax.get_lines() if ln.get_gid() == USER_POINT_GID]


def render_twice(make) -> tuple[Figure, dict[str, bytes]]:
    out: dict[str, bytes] = {}
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        fig, again = make(), make()  # the same call twice
        for fmt in ("png", "svg"):
            first = save_figure(fig, None, fmt)
            assert save_figure(again, None, fmt) == first, f"{fmt} bytes differ"
            out[fmt] = first
        # rendering history does not matter: the first figure was drawn as PNG before SVG
        assert save_figure(fig, None, "png") == out["png"]
    assert out["png"].startswith(b"\x89PNG\r\n\x1a\n")
    assert out["svg"].lstrip().startswith(b"<?xml") and b"<svg" in out["svg"]
    assert b"<dc:date>" not in out["svg"]          # metadata {'Date': None}
    assert b"Software" not in out["png"]           # metadata {'Software': None}
    return fig, out


CASES = {
    "phase_diagram": lambda: plot_phase_diagram(TANH, (1.5, 0.05), depth=50, **SMALL),
    "variance_map": lambda: plot_variance_map(TANH, (1.5, 0.05)),
    "correlation_map": lambda: plot_correlation_map(TANH, (2.5, 0.1), n_points=21),
    "depth_scales": lambda: plot_depth_scales(TANH, (1.5, 0.05), n_points=25, depth=50),
}


@pytest.mark.parametrize("kind", list(CASES))
def test_plot_renders_deterministically_with_the_marker(kind):
    fig, out = render_twice(CASES[kind])
    assert isinstance(fig, Figure)
    assert len(user_markers(fig)) == 1
    assert f'id="{USER_POINT_GID}"'.encode() in out["svg"]


def test_phase_diagram_content():
    fig = plot_phase_diagram(TANH, (1.5, 0.05), **SMALL)
    ax = fig.axes[0]
    (marker,) = user_markers(fig)
    assert tuple(marker.get_xydata()[0]) == (1.5, 0.05)
    labels = [t.get_text() for t in fig.legends[0].get_texts()]
    assert any("edge of chaos" in t for t in labels)
    assert any(t.startswith("your point (1.5, 0.05): ordered, xi_c = 15.8") for t in labels)
    assert any("trainable depth 6 xi_c" in t for t in labels)
    # the edge line goes through tanh's critical point at sigma_b2 = 0.05 (edge_of_chaos_at_bias)
    sw_c = propcalc.edge_of_chaos_at_bias(TANH, 0.05)[-1].sigma_w2
    edge = [ln for ln in ax.get_lines() if ln.get_linewidth() == 2.0][0].get_xydata()
    assert np.interp(0.05, edge[:, 1], edge[:, 0]) == pytest.approx(sw_c, rel=1e-3)
    assert ax.get_xlim() == (0.1, 4.0) and ax.get_ylim() == (0.0, 0.5)


def test_phase_diagram_reuses_a_sweep_and_other_activations():
    res = sweep("relu", np.linspace(0.5, 3.0, 6), np.linspace(0.0, 0.3, 4), progress=False)
    relu = propcalc.activation("relu")
    plan = propcalc.recommend(relu, widths=[8, 16, 16, 4], sigma_b2=0.0)
    fig, _ = render_twice(lambda: plot_phase_diagram(relu, plan, result=res))
    labels = [t.get_text() for t in fig.legends[0].get_texts()]
    assert "variance grows without bound" in labels
    assert any(t.startswith("edge of chaos: one point (2, 0)") for t in labels)  # He et al. 2015
    gelu = propcalc.activation("gelu")
    render_twice(lambda: plot_phase_diagram(gelu, **SMALL))
    with pytest.raises(InvalidParameterError, match="result must be a sweep over gelu"):
        plot_phase_diagram(gelu, result=res)


def test_variance_map_fixed_points_and_unbounded():
    p = propcalc.propagation(TANH, 1.5, 0.05)
    fig = plot_variance_map(TANH, p)
    (marker,) = user_markers(fig)
    np.testing.assert_allclose(marker.get_xydata()[0], [p.q_star, p.q_star])
    relu = propcalc.activation("relu")
    fig, _ = render_twice(lambda: plot_variance_map(relu, (3.0, 0.1)))
    assert "grows" in fig.axes[0].texts[0].get_text()
    assert user_markers(fig) == []  # no fixed point to mark


def test_correlation_map_cases():
    # chaotic: c* < 1 marked; ordered: only c = 1; unbounded: a note, no curve
    fig = plot_correlation_map(TANH, (2.5, 0.1), n_points=11)
    p = propcalc.propagation(TANH, 2.5, 0.1)
    np.testing.assert_allclose(user_markers(fig)[0].get_xydata()[0], [p.c_star, p.c_star])
    fig = plot_correlation_map(TANH, propcalc.edge_of_chaos(TANH, 1.0), n_points=11)
    assert user_markers(fig) == []
    render_twice(lambda: plot_correlation_map(propcalc.activation("relu"), (3.0, 0.1),
                                              n_points=11))
    render_twice(lambda: plot_correlation_map(TANH, (0.5, 0.0), c_min=0.0, n_points=11))


def test_depth_scales_marks_the_edge():
    fig = plot_depth_scales(TANH, sigma_b2=0.05, n_points=25)
    ax = fig.axes[0]
    sw_c = propcalc.edge_of_chaos_at_bias(TANH, 0.05)[-1].sigma_w2
    vlines = [ln for ln in ax.get_lines() if ln.get_linestyle() == "--"]
    assert vlines and vlines[0].get_xdata()[0] == pytest.approx(sw_c, rel=1e-12)
    assert ax.get_yscale() == "log"
    top = ax.get_ylim()[1]
    # xi_c is infinite at the edge: drawn beyond the clipped top, never NaN
    xi_c = ax.get_lines()[1].get_ydata()
    assert np.all(np.isfinite(xi_c)) and np.max(xi_c) > top
    render_twice(lambda: plot_depth_scales(propcalc.activation("relu"), sigma_b2=0.1,
                                           n_points=15))


def test_save_figure_to_path_and_buffer(tmp_path):
    fig = plot_variance_map(TANH, (1.5, 0.05))
    data = save_figure(fig, tmp_path / "v.svg", "svg")
    assert (tmp_path / "v.svg").read_bytes() == data
    buf = io.BytesIO()
    assert save_figure(fig, buf, "PNG") == buf.getvalue()
    with pytest.raises(InvalidParameterError, match="format must be one of png, svg"):
        save_figure(fig, None, "jpeg")
    with pytest.raises(InvalidParameterError, match="fig must be a matplotlib Figure"):
        save_figure("fig", None, "png")  # type: ignore[arg-type]


def test_bad_points_and_ranges():
    with pytest.raises(InvalidParameterError, match="point must be given"):
        plot_variance_map(TANH, None)
    with pytest.raises(InvalidParameterError, match="point.sigma_w2 must be > 0"):
        plot_variance_map(TANH, (-1.0, 0.0))
    with pytest.raises(InvalidParameterError, match="point must be a Propagation"):
        plot_correlation_map(TANH, "1.5, 0.05")
    with pytest.raises(InvalidParameterError, match="point must be a result for tanh"):
        plot_variance_map(TANH, propcalc.propagation(propcalc.activation("relu"), 1.0, 0.1))
    with pytest.raises(InvalidParameterError, match="sigma_w2_range must be a pair"):
        plot_phase_diagram(TANH, sigma_w2_range=(2.0, 1.0), **SMALL)
    with pytest.raises(InvalidParameterError, match="c_min must be in"):
        plot_correlation_map(TANH, (1.5, 0.05), c_min=1.0)


def test_no_pyplot_state_is_used():
    # figures are built with matplotlib.figure.Figure directly: pyplot is never imported
    code = ("import sys, propcalc; from propcalc.output.plots import plot_variance_map, save_figure; "
            "save_figure(plot_variance_map(propcalc.activation('tanh'), (1.5, 0.05)), None, 'png');"
            "assert 'matplotlib.pyplot' not in sys.modules")
    subprocess.run([sys.executable, "-c", code], check=True, timeout=120)


# ---------------------------------------------------------------------------------------------
# issue 12 section 3: pictures that mislead
# ---------------------------------------------------------------------------------------------
def png_size(data: bytes) -> tuple[int, int]:
    """Width and height from the IHDR chunk (PNG specification, ISO/IEC 15948:2004, 11.2.2)."""
    return struct.unpack(">II", data[16:24])


def legend_texts(fig: Figure) -> list[str]:
    """The legend's entries, each on one line (long ones are wrapped in the figure)."""
    legends = fig.legends or [ax.get_legend() for ax in fig.axes if ax.get_legend()]
    return [" ".join(t.get_text().split()) for lg in legends for t in lg.get_texts()]


def renderer_of(fig: Figure):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    return FigureCanvasAgg(fig).get_renderer()


SHAPES = ["tanh", "relu", "gelu", "hard_tanh", "x * tanh(softplus(x))", "sin(x) + x"]
POINTS = {"tanh": (1.5, 0.05), "relu": (2.0, 0.0), "gelu": (1.8, 0.1), "hard_tanh": (1.3, 0.02),
          "x * tanh(softplus(x))": (1.8, 0.05), "sin(x) + x": (0.8, 0.05)}
KINDS = {
    "phase_diagram": (lambda a, p: plot_phase_diagram(a, p, depth=50, n_grid=(15, 11)), (720, 520)),
    "variance_map": (lambda a, p: plot_variance_map(a, p), (640, 520)),
    "correlation_map": (lambda a, p: plot_correlation_map(a, p, n_points=15), (640, 520)),
    "depth_scales": (lambda a, p: plot_depth_scales(a, p, n_points=21, depth=50), (720, 520)),
}


@pytest.mark.parametrize("kind", list(KINDS))
@pytest.mark.parametrize("name", SHAPES)
def test_every_kind_for_six_activations_size_determinism_no_warnings(kind, name):
    make, size = KINDS[kind]
    act = propcalc.activation(name)
    fig, out = render_twice(lambda: make(act, POINTS[name]))
    assert png_size(out["png"]) == size  # figsize x 100 dpi
    texts = legend_texts(fig)
    assert not [t for t in texts if re.search(r"= -(\s|,|\)|$)", t)]  # no bare "-" for a value


def _first_crossing(row: np.ndarray, x: np.ndarray) -> float:
    """Where a signed field first changes sign along a row (linear interpolation, as contourf)."""
    k = int(np.flatnonzero(np.sign(row[:-1]) != np.sign(row[1:]))[0])
    return float(x[k] + row[k] / (row[k] - row[k + 1]) * (x[k + 1] - x[k]))


def test_relu_boundary_at_two_from_bisection_not_the_grid():
    # ReLU: V(q) = sigma_w2 q / 2 + sigma_b2 (Cho & Saul 2009 arc-cosine kernel of degree 1), so
    # with sigma_b2 > 0 the variance is bounded exactly when sigma_w2 < 2 (He et al. 2015).
    relu = propcalc.activation("relu")
    sw, sb = np.linspace(0.1, 4.0, 81), np.linspace(0.0, 0.5, 61)  # no node at sigma_w2 = 2
    res = sweep(relu, sw, sb, progress=False)
    reg = locate_regions(relu, sw, sb, res.phase[0], 1.0, DEFAULT_RULE)
    cell = sw[1] - sw[0]
    for j in range(1, sb.size):
        assert _first_crossing(reg.unbounded[:, j], sw) == pytest.approx(2.0, abs=cell / 100)
    # no one-cell "ordered" strip beside it: the ordered region ends where the unbounded begins
    for j in range(1, sb.size):
        assert _first_crossing(-reg.ordered[:, j], sw) == pytest.approx(2.0, abs=cell / 100)
    fig = plot_phase_diagram(relu, result=res)
    labels = legend_texts(fig)
    assert not any(t.startswith("chaotic") for t in labels)  # no chaotic region is drawn
    assert "variance grows without bound" in labels


def test_gelu_unbounded_boundary_is_the_computed_line():
    # Below the edge line the boundary of the unbounded region is where the first layer's
    # variance q_1 = sigma_w2 q_input + sigma_b2 meets the repelling fixed point q_r: both
    # V(q_r) = q_r and q_1 = q_r give E[gelu(sqrt(q_r) z)^2] = q_input, so the boundary is the
    # straight line sigma_b2 = q_r - sigma_w2 q_input (Poole et al. 2016, eq. 3). q_r from
    # scipy.integrate.quad and brentq, independent of the package's quadrature.
    from scipy import integrate, optimize, special

    def m2(q):
        f = lambda z: (np.sqrt(q) * z * 0.5 * (1 + special.erf(np.sqrt(q) * z / np.sqrt(2)))) ** 2 \
            * np.exp(-z * z / 2) / np.sqrt(2 * np.pi)
        return integrate.quad(f, -np.inf, np.inf, epsabs=1e-13, epsrel=1e-13)[0]

    q_r = optimize.brentq(lambda q: m2(q) - 1.0, 1.0, 10.0, xtol=1e-14)
    gelu = propcalc.activation("gelu")
    sw, sb = np.linspace(1.5, 2.5, 21), np.linspace(0.0, 0.12, 13)
    res = sweep(gelu, sw, sb, progress=False)
    reg = locate_regions(gelu, sw, sb, res.phase[0], 1.0, DEFAULT_RULE)
    pts = np.concatenate(reg.unbounded_boundary)
    low = pts[pts[:, 1] < 0.1]
    assert low.shape[0] > 10
    # bisection leaves half an interval: a cell / 2^(BISECTION_STEPS + 1) along sigma_w2
    np.testing.assert_allclose(low[:, 1], q_r - low[:, 0],
                               atol=(sw[1] - sw[0]) / 2 ** BISECTION_STEPS)


def test_gelu_edge_line_is_solid_only_where_it_is_the_edge():
    # chi_1 = 1 at the fixed point reached (Schoenholz et al. 2017, eq. 8) on the solid part;
    # chi_q = V'(q*) > 1 (the fixed point repels) on the dotted part: checked point by point
    # with the single-point report.
    gelu = propcalc.activation("gelu")
    parts = edge_line_parts(gelu, 1.0, DEFAULT_RULE)
    x, y = parts["reached"]
    ok = np.isfinite(x)
    inner = ok & np.roll(ok, 1) & np.roll(ok, -1)  # piece ends are shared with the neighbours
    inner[[0, -1]] = False
    for k in np.flatnonzero(inner)[::80]:
        # within the tolerance of the line's own rounding (sigma_b2 = q* - sigma_w2 E[phi^2])
        assert propcalc.propagation(gelu, x[k], y[k]).chi_1 == pytest.approx(1.0, abs=1e-6)
    x, y = parts["repelling"]
    ok = np.flatnonzero(np.isfinite(x) & (y > 1e-3))
    assert ok.size > 10
    for k in ok[1:-1:40]:  # the ends are shared with the neighbouring pieces
        p = propcalc.propagation(gelu, x[k], y[k])
        assert p.phase != "edge of chaos"
        # the variance goes elsewhere: unbounded, or to a fixed point other than the line's
        assert p.q_star is None or abs(p.chi_1 - 1.0) > 1e-6
    fig = plot_phase_diagram(gelu, n_grid=(15, 11))
    labels = legend_texts(fig)
    assert "chi_1 = 1 at a repelling q* (never reached)" in labels
    styles = {ln.get_linestyle() for ln in fig.axes[0].get_lines() if ln.get_color() == "0.25"}
    assert styles == {":"}


def _overlaps(boxes) -> list[tuple[int, int]]:
    return [(i, j) for i in range(len(boxes)) for j in range(i + 1, len(boxes))
            if boxes[i].overlaps(boxes[j])]


@pytest.mark.parametrize("name", ["tanh", "relu", "gelu"])
def test_contour_labels_do_not_overlap_and_titles_fit(name):
    act = propcalc.activation(name)
    fig = plot_phase_diagram(act, POINTS[name], depth=50, n_grid=(41, 31))
    renderer = renderer_of(fig)
    ax = fig.axes[0]
    labels = [t for t in ax.texts if t.get_text()]
    assert labels  # some contours are labelled
    boxes = [t.get_window_extent(renderer) for t in labels]
    assert _overlaps(boxes) == []
    title = ax.title.get_window_extent(renderer)
    assert title.x0 >= 0 and title.x1 <= fig.bbox.x1 and title.y1 <= fig.bbox.y1


def test_long_formula_titles_are_wrapped_inside_the_figure():
    act = propcalc.activation("x * tanh(softplus(x)) + 0.001 * sin(x) * cos(x) + 0.0001 * x ** 3")
    for fig in (plot_variance_map(act, (1.5, 0.05)),
                plot_depth_scales(act, (1.5, 0.05), n_points=11)):
        renderer = renderer_of(fig)
        title = fig.axes[0].title
        assert "\n" in title.get_text()
        box = title.get_window_extent(renderer)
        assert box.x0 >= 0 and box.x1 <= fig.bbox.x1 and box.y1 <= fig.bbox.y1


def test_xi_c_is_said_in_words():
    relu = propcalc.activation("relu")
    fig = plot_phase_diagram(relu, (3.0, 0.1), n_grid=(7, 5))
    assert any("no xi_c (the variance grows without bound)" in t for t in legend_texts(fig))
    fig = plot_phase_diagram(relu, (2.0, 0.0), n_grid=(7, 5))
    assert any("xi_c infinite" in t for t in legend_texts(fig))


def test_depth_scales_marks_only_the_reached_critical_point():
    # gelu at sigma_b2 = 0.1: chi_1 = 1 at sigma_w2 = 2.077 on a q* the variance from q_input = 1
    # does not reach (it grows without bound there): no dashed edge line, a dotted grey one
    gelu = propcalc.activation("gelu")
    fig = plot_depth_scales(gelu, sigma_b2=0.1, n_points=21)
    ax = fig.axes[0]
    assert [ln for ln in ax.get_lines() if ln.get_color() == "#111111"] == []  # no edge line
    dotted = [ln for ln in ax.get_lines() if ln.get_color() == "0.4"]
    (cp,) = [c for c in propcalc.edge_of_chaos_at_bias(gelu, 0.1) if c.valid]
    assert dotted and dotted[0].get_xdata()[0] == pytest.approx(cp.sigma_w2, rel=1e-12)
    assert any("is never reached" in t for t in legend_texts(fig))
    # the curves run up to the band where the variance grows without bound
    xs = ax.get_lines()[0].get_xdata()
    ys = ax.get_lines()[0].get_ydata()
    last = float(np.max(np.asarray(xs)[np.isfinite(ys)]))
    band = min(p.get_x() if hasattr(p, "get_x") else p.get_xy()[0][0] for p in ax.patches)
    assert 0.0 <= band - last < 1e-3


def test_map_on_the_identity_is_magnified():
    relu = propcalc.activation("relu")
    # V(q) = q + 1e-3 (ReLU at sigma_w2 = 2; Cho & Saul 2009): invisible at the scale of q
    fig = plot_variance_map(relu, (2.0, 1e-3))
    assert len(fig.axes) == 2
    low = fig.axes[1]
    np.testing.assert_allclose(low.get_lines()[1].get_ydata(), 1e-3, rtol=1e-9)
    assert "V(q) - q magnified" in low.get_title(loc="left")
    # V(q) = q exactly: said in words
    fig = plot_variance_map(relu, (2.0, 0.0))
    assert "within rounding" in fig.axes[1].get_title(loc="left")
    # a map far from the identity keeps one panel
    assert len(plot_variance_map(TANH, (1.5, 0.05)).axes) == 1
    # C(c) within a hair of c: tanh just above sigma_w2 = 1 with sigma_b2 = 0 (q* small)
    fig = plot_correlation_map(TANH, (1.0005, 0.0), n_points=15)
    assert len(fig.axes) == 2 and "C(c) - c" in fig.axes[1].get_ylabel()


def test_phase_diagram_says_what_lies_outside_the_window():
    # sigmoid: ordered over the whole default window, its edge far to the right
    fig = plot_phase_diagram(propcalc.activation("sigmoid"), n_grid=(7, 5))
    labels = legend_texts(fig)
    assert any(t.startswith("edge of chaos outside this window (nearest: sigma_w2 = ")
               for t in labels)
    assert any(t.startswith("xi_c from ") and t.endswith("no level crossed") for t in labels)
    # ReLU's one critical point (2, 0) (He et al. 2015) and a point beyond the window
    relu = propcalc.activation("relu")
    fig = plot_phase_diagram(relu, (3.0, 0.1), sigma_w2_range=(0.5, 1.5), n_grid=(7, 5))
    labels = legend_texts(fig)
    assert "edge of chaos: one point (2, 0), outside this window" in labels
    assert any(t.endswith("(outside this window)") and t.startswith("your point (3, 0.1)")
               for t in labels)
    assert user_markers(fig) == []
    assert all(np.all(ln.get_xdata() <= 1.5) for ln in fig.axes[0].get_lines())
    # step jumps: chi_1 is infinite, there is no line
    fig = plot_phase_diagram(propcalc.activation("step"), n_grid=(5, 4))
    assert any("chi_1 is infinite for an activation with a jump" in t
               for t in legend_texts(fig))


def test_depth_scales_names_a_curve_below_its_axis():
    # step: V(q) = sigma_w2 / 2 + sigma_b2 does not depend on q (P(z > 0) = 1/2), so chi_q = 0
    # and xi_q = 0 (Schoenholz et al. 2017, eq. 6): nothing to draw on a log axis, said in words
    fig = plot_depth_scales(propcalc.activation("step"), sigma_b2=0.05, n_points=9)
    assert any("= 0 here (settled in one layer), below the axis" in t
               for t in legend_texts(fig))


def test_wide_windows_are_sampled_and_drawn_on_a_log_axis():
    # [1e-6, 1e4]: on a linear axis everything below sigma_w2 = 100 fell into one pixel column
    ht = propcalc.activation("hard_tanh")
    fig = plot_phase_diagram(ht, sigma_w2_range=(1e-6, 1e4), sigma_b2_range=(0, 1e4),
                             n_grid=(9, 7))
    assert fig.axes[0].get_xscale() == "log" and fig.axes[0].get_yscale() == "linear"
    fig = plot_depth_scales(ht, sigma_b2=1e4, sigma_w2_range=(1e-6, 1e4), n_points=11)
    assert fig.axes[0].get_xscale() == "log"
    # the default window stays linear
    assert plot_depth_scales(TANH, sigma_b2=0.05, n_points=9).axes[0].get_xscale() == "linear"


def test_contours_keep_every_vertex():
    # tanh's xi_c = 1 contour crosses every row of the grid: one vertex per row at least
    # (a path simplified in data units had 4 vertices and drew polygons)
    from matplotlib.contour import ContourSet

    fig = plot_phase_diagram(TANH, n_grid=(21, 31))
    sets = [c for c in fig.axes[0].collections if isinstance(c, ContourSet)]
    (rates,) = [c for c in sets if np.any(np.isclose(c.levels, 1.0))]  # rate 1/xi_c = 1
    k = int(np.flatnonzero(np.isclose(rates.levels, 1.0))[0])
    assert len(rates.get_paths()[k].vertices) >= 31
