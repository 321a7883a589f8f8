"""What every figure of :mod:`propcalc.output.plots` shares: points, words, layout, bytes.

* the user's point given as a report, a plan, a critical point or a pair
  (:func:`resolve_point`);
* numbers and absent values in words (:func:`fmt`, :func:`xi_c_words`);
* titles that fit the figure (:func:`fit_title`), a new figure and its
  frozen layout (:func:`new_figure`, :func:`finish`);
* contour labels placed so that they do not overlap (:func:`place_labels`);
* :func:`save_figure`: PNG or SVG bytes that are the same for the same figure.
"""

from __future__ import annotations

import io
import math
import os
import threading
from collections.abc import Sequence
from typing import IO, Any

import numpy as np

from ..errors import install_hint

try:
    import matplotlib
    from matplotlib.figure import Figure
except ImportError as exc:  # pragma: no cover - exercised only without the extra
    raise ImportError(f"propcalc.output.plots needs matplotlib: {install_hint('plot')}") from exc

from ..activations.base import Activation
from ..errors import InvalidParameterError, check_int, check_nonnegative, check_positive
from ..init.plan import InitPlan
from ..meanfield.edge import CriticalPoint
from ..meanfield.report import Propagation, propagation
from ..numerics.quadrature import QuadratureRule

__all__ = ["FORMATS", "USER_POINT_GID", "PointLike", "save_figure", "resolve_point", "fmt",
           "xi_c_words", "new_figure", "finish", "fit_title", "check_range", "grid_shape",
           "mark_user", "wrap", "place_labels", "legend_below", "wide", "axis_points",
           "WIDE_RATIO"]

#: Formats :func:`save_figure` writes.
FORMATS = ("png", "svg")
#: The ``gid`` of the user's marker (it becomes the element id in SVG output).
USER_POINT_GID = "user-point"

PointLike = Propagation | InitPlan | CriticalPoint | Sequence[float] | None

ORDERED = "#c9dcf0"
CHAOTIC = "#f6d2c4"
UNBOUNDED = "#d9d9d9"
EDGE = "#111111"
XI = "#3d3d3d"
DEPTH = "#7b2d8e"
USER = "#e8a000"
SIZE = (7.2, 5.2)
#: Characters of an 11-point title per inch of figure width (DejaVu Sans averages about
#: 0.55 em per character; measured on the titles drawn here, common practice, no source).
_CHARS_PER_INCH = 11.0
#: Characters of an 8-point legend line per inch (the same measure, less the markers).
_LEGEND_CHARS_PER_INCH = 14.0
#: Labels keep this far (inches) from the axes' borders, and a piece of contour shorter than
#: _LABEL_MIN_LENGTH inches inside that margin gets none.
_LABEL_MARGIN = 0.35
_LABEL_MIN_LENGTH = 0.8
#: A positive sigma_w2 range at least this wide (hi / lo) is sampled geometrically and drawn
#: on a log axis: on a linear one the window [1e-6, 1e4] squeezed everything below 100 into
#: one pixel column.
WIDE_RATIO = 100.0
#: A title is cut after this many lines (formulas may be 500 characters long).
_TITLE_LINES = 3


def resolve_point(act: Activation, point: PointLike, q_input: float,
                  rule: QuadratureRule) -> Propagation | None:
    """The propagation report at the user's point (None when no point is given)."""
    if point is None:
        return None
    if isinstance(point, InitPlan):
        prop = point.propagation
    elif isinstance(point, Propagation):
        prop = point
    elif isinstance(point, CriticalPoint):
        if not point.valid or point.sigma_w2 is None or point.sigma_b2 is None:
            raise InvalidParameterError("point", "a valid critical point", point.message)
        if point.activation != act.label:
            raise InvalidParameterError("point", f"a result for {act.label}", point.activation)
        return propagation(act, point.sigma_w2, point.sigma_b2, q_input=q_input, rule=rule)
    else:
        try:
            sw, sb = point  # type: ignore[misc]
        except (TypeError, ValueError):
            raise InvalidParameterError(
                "point", "a Propagation, InitPlan, CriticalPoint or (sigma_w2, sigma_b2) pair",
                point) from None
        return propagation(act, check_positive("point.sigma_w2", sw),
                           check_nonnegative("point.sigma_b2", sb), q_input=q_input, rule=rule)
    if prop.activation != act.label:
        raise InvalidParameterError("point", f"a result for {act.label}", prop.activation)
    return prop


def fmt(v: float | None, digits: int = 4, absent: str = "undefined") -> str:
    """A number for a label: ``digits`` significant digits, inf spelled, None in words."""
    if v is None:
        return absent
    if math.isinf(v):
        return "inf" if v > 0 else "-inf"
    if abs(v) < 1e-12:  # rounding residue of an exact zero (e.g. sigma_b2 on ReLU's edge)
        return "0"
    return f"{v:.{digits}g}"


def xi_c_words(prop: Propagation, digits: int = 3) -> str:
    """xi_c of a report in words: a number, infinite at the edge, or why there is none."""
    if prop.xi_c is None or (isinstance(prop.xi_c, float) and math.isnan(prop.xi_c)):
        if prop.q_star is None:
            return "no xi_c (the variance grows without bound)"
        return "no xi_c (no correlation fixed point)"
    if math.isinf(prop.xi_c):
        return "xi_c infinite (power-law approach)"
    return f"xi_c = {fmt(prop.xi_c, digits)}"


def new_figure(size: tuple[float, float] = SIZE) -> Figure:
    """A figure built without pyplot, laid out by the constrained layout engine."""
    return Figure(figsize=size, dpi=100, layout="constrained")


def finish(fig: Figure) -> Figure:
    """Run the constrained layout once and freeze it.

    The layout solver starts from the current positions, so a figure drawn
    twice (PNG, then SVG) would shift by a fraction of a pixel; fixing the
    layout when the figure is made keeps the bytes a function of the call.
    Re-enable it with ``fig.set_layout_engine("constrained")`` after editing.
    """
    fig.draw_without_rendering()
    fig.set_layout_engine("none")
    return fig


def wrap(text: str, width: int) -> str:
    """Break ``text`` into lines of at most ``width`` characters (longer words on their own)."""
    words, lines, cur = text.split(), [], ""
    for w in words:
        if cur and len(cur) + 1 + len(w) > width:
            lines.append(cur)
            cur = w
        else:
            cur = f"{cur} {w}" if cur else w
    if cur:
        lines.append(cur)
    return "\n".join(lines)


def fit_title(ax: Any, fig: Figure, *parts: str, fontsize: float = 11.0, pad: float = 6.0
              ) -> str:
    """Set a title that fits the figure's width: parts joined, wrapped, long ones cut.

    Each part starts a new line when the whole does not fit on one; a part
    longer than a line (a typed formula) is broken at spaces, or anywhere,
    and the title stops after a few lines with an ellipsis.
    """
    width = max(20, int(fig.get_figwidth() * _CHARS_PER_INCH * 11.0 / fontsize))
    one = " ".join(parts)
    if len(one) <= width:
        text = one
    else:
        lines: list[str] = []
        for part in parts:
            for line in wrap(part, width).split("\n"):
                lines += [line[k:k + width] for k in range(0, len(line), width)] or [""]
        if len(lines) > _TITLE_LINES:
            lines = lines[:_TITLE_LINES]
            lines[-1] = lines[-1][:width - 3] + "..."
        text = "\n".join(lines)
    ax.set_title(text, fontsize=fontsize, pad=pad)
    return text


def legend_below(fig: Figure, handles: Sequence[Any] | None = None) -> None:
    """The legend under the axes: two columns when its lines are short enough, else one."""
    if handles is None:
        handles = [h for ax in fig.axes for h in ax.get_legend_handles_labels()[0]]
    longest = max((max(len(s) for s in str(h.get_label()).split("\n")) for h in handles),
                  default=0)
    cols = 2 if longest * 2 <= fig.get_figwidth() * _LEGEND_CHARS_PER_INCH else 1
    fig.legend(handles=handles, loc="outside lower center", ncols=cols, fontsize=8,
               frameon=False)


def wide(lo: float, hi: float) -> bool:
    """Whether a positive range spans enough decades (WIDE_RATIO) for a log axis."""
    return lo > 0.0 and hi / lo >= WIDE_RATIO


def axis_points(lo: float, hi: float, n: int) -> np.ndarray:
    """n samples of [lo, hi]: evenly spaced, or geometrically for a wide positive range."""
    return np.geomspace(lo, hi, n) if wide(lo, hi) else np.linspace(lo, hi, n)


def check_range(name: str, value: Any, positive: bool) -> tuple[float, float]:
    """A (low, high) pair with 0 <= low (0 < low if positive) < high."""
    try:
        lo, hi = (float(v) for v in value)
    except (TypeError, ValueError):
        raise InvalidParameterError(name, "a pair (low, high)", value) from None
    lo = check_positive(f"{name}[0]", lo) if positive else check_nonnegative(f"{name}[0]", lo)
    hi = check_positive(f"{name}[1]", hi)
    if hi <= lo:
        raise InvalidParameterError(name, "a pair (low, high) with low < high", value)
    return lo, hi


def grid_shape(n_grid: Any) -> tuple[int, int]:
    """Points along (sigma_w2, sigma_b2) from an int or a pair of ints, each in [3, 2000]."""
    if isinstance(n_grid, (int, np.integer)) and not isinstance(n_grid, bool):
        n = check_int("n_grid", n_grid, 3, 2000)
        return n, n
    try:
        a, b = n_grid
    except (TypeError, ValueError):
        raise InvalidParameterError("n_grid", "an int or a pair of ints", n_grid) from None
    return check_int("n_grid[0]", a, 3, 2000), check_int("n_grid[1]", b, 3, 2000)


def mark_user(ax: Any, x: float, y: float, label: str) -> None:
    """The user's point: an orange star with the gid USER_POINT_GID."""
    ax.plot([x], [y], linestyle="none", marker="*", markersize=17, color=USER,
            markeredgecolor="black", markeredgewidth=1.0, zorder=10, label=label,
            gid=USER_POINT_GID, clip_on=False)


def place_labels(ax: Any, contour_sets: Sequence[tuple[Any, Any, float]],
                 avoid: Sequence[tuple[float, float]] = (), spacing: float = 0.5) -> list[float]:
    """Label contours where the labels do not overlap; return the levels labelled.

    Parameters
    ----------
    ax : Axes
    contour_sets : sequence of (ContourSet, format, fontsize)
        In order of priority: earlier sets choose their places first.
    avoid : sequence of (x, y)
        Data points no label may cover (the user's point).
    spacing : float
        Smallest distance between two labels, in inches of the axes.

    Notes
    -----
    Candidates are the vertices of each level's lines inside the axes (away
    from its borders); the one farthest from the labels already placed is
    taken, and a level with no candidate ``spacing`` away stays unlabelled
    (the legend lists every level drawn).
    """
    (x0, x1), (y0, y1) = ax.get_xlim(), ax.get_ylim()
    pos = ax.get_position()
    fig = ax.get_figure()
    wi = max(pos.width * fig.get_figwidth(), 1e-3)
    hi = max(pos.height * fig.get_figheight(), 1e-3)

    log_x = ax.get_xscale() == "log"

    def inches(xy: np.ndarray) -> np.ndarray:
        x = xy[:, 0]
        fx = np.log(x / x0) / np.log(x1 / x0) if log_x else (x - x0) / (x1 - x0)
        return np.column_stack([fx * wi, (xy[:, 1] - y0) / (y1 - y0) * hi])

    placed = [inches(np.array([p]))[0] for p in avoid]
    labelled: list[float] = []
    for cs, form, size in contour_sets:
        positions, levels = [], []
        for level, segs in zip(cs.levels, cs.allsegs):
            for seg in segs:  # each piece of the level's line gets its own label
                if len(seg) < 2:
                    continue
                at = inches(seg)
                inside = ((at[:, 0] > _LABEL_MARGIN) & (at[:, 0] < wi - _LABEL_MARGIN)
                          & (at[:, 1] > _LABEL_MARGIN) & (at[:, 1] < hi - _LABEL_MARGIN))
                steps = np.hypot(*np.diff(at, axis=0).T)
                if not inside.any() or float(np.sum(steps[inside[1:]])) < _LABEL_MIN_LENGTH:
                    continue
                xy, at = seg[inside], at[inside]
                if placed:
                    ref = np.array(placed)
                    d = np.min(np.hypot(at[:, None, 0] - ref[None, :, 0],
                                        at[:, None, 1] - ref[None, :, 1]), axis=1)
                else:  # the first label: the middle of the axes
                    d = -np.hypot(at[:, 0] - wi / 2, at[:, 1] - hi / 2)
                k = int(np.argmax(d))
                if placed and d[k] < spacing:
                    continue
                placed.append(at[k])
                positions.append((float(xy[k, 0]), float(xy[k, 1])))
                if float(level) not in levels:
                    levels.append(float(level))
        if positions:
            ax.clabel(cs, levels=levels, manual=positions, fmt=form, fontsize=size, inline=True)
            labelled += levels
    return labelled


_SAVE_LOCK = threading.Lock()


def save_figure(fig: Figure, path_or_buffer: str | os.PathLike[str] | IO[bytes] | None = None,
                format: str = "png", *, dpi: float = 100.0) -> bytes:
    """Render a figure to PNG or SVG bytes that are identical for identical figures.

    Parameters
    ----------
    fig : matplotlib.figure.Figure
    path_or_buffer : path, binary file object or None
        Where to write the bytes (None: only return them).
    format : str
        "png" or "svg".
    dpi : float
        Resolution of PNG output.

    Returns
    -------
    bytes
        What was written.

    Notes
    -----
    Repeatable bytes: the SVG hash salt is fixed (it seeds the element ids),
    SVG carries no date and PNG no software tag; text is drawn as paths.
    """
    fmt_ = str(format).lower()
    if fmt_ not in FORMATS:
        raise InvalidParameterError("format", f"one of {', '.join(FORMATS)}", format)
    if not isinstance(fig, Figure):
        raise InvalidParameterError("fig", "a matplotlib Figure", type(fig).__name__)
    d = check_positive("dpi", dpi)
    metadata = {"Date": None} if fmt_ == "svg" else {"Software": None}
    buf = io.BytesIO()
    # rc_context changes process-wide settings: one figure at a time (threads in a server)
    with _SAVE_LOCK, matplotlib.rc_context({"svg.hashsalt": "propcalc", "svg.fonttype": "path"}):
        fig.savefig(buf, format=fmt_, dpi=d, metadata=metadata)
    data = buf.getvalue()
    if path_or_buffer is not None:
        if hasattr(path_or_buffer, "write"):
            path_or_buffer.write(data)  # type: ignore[union-attr]
        else:
            with open(path_or_buffer, "wb") as fh:
                fh.write(data)
    return data
