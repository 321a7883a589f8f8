"""Tests of propcalc.output.plots: every figure renders, deterministically, with the user's marker.

Warnings are errors (pytest configuration and the explicit filter below), so
"no warnings" is part of every rendering check. Grids are kept small: the
figures' numbers come from the sweep and the maps, which have their own tests.
"""

from __future__ import annotations

import io
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
