"""Request schemas of the images (the /v1/plots endpoints of the basic maps).

Built per app like the other request schemas (their grids are bounded by the app's limits), by
:func:`build_plot_schemas`, which :func:`propcalc_api._schemas.build_schemas` calls with the
activation field it uses everywhere.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any

from marshmallow import ValidationError, post_load, validates_schema

from ._config import (
    MAP_Q_MAX,
    PHASE_GRID_MAX,
    PLOT_DPI_DEFAULT,
    PLOT_DPI_MAX,
    PLOT_DPI_MIN,
    PLOT_FORMATS,
    XI_MAX_MAX,
    Limits,
)
from ._fields import Choice, FiniteNumber, Interval, JSONInteger, format_number
from ._schema_base import (PLOT_MAX_ITERATIONS, StrictSchema, _d, q_input_field, sigma_b2_field,
                           sigma_w2_field)

__all__ = ["build_plot_schemas"]


def build_plot_schemas(limits: Limits, activation_field: Callable[[], Any],
                       names: Sequence[str]) -> dict[str, type[StrictSchema]]:
    """The image request schemas by class name (``ImageOptionsSchema`` included)."""
    def axis_points(minimum: int, engine_max: int, default: int, text: str) -> JSONInteger:
        top = max(minimum, min(limits.max_grid_points, engine_max))
        return JSONInteger(validate=Interval(minimum, top), load_default=default, metadata=_d(
            f"{text} (default {default}; at most {top}: MAX_GRID_POINTS)"))

    def check_window(data: dict[str, Any], name: str, errors: dict[str, list[str]]) -> None:
        lo_key, hi_key = f"{name}_min", f"{name}_max"
        lo, hi = data.get(lo_key), data.get(hi_key)
        if lo is None and hi is not None:
            errors.setdefault(lo_key, []).append(f"is required when {hi_key} is given")
        elif hi is None and lo is not None:
            errors.setdefault(hi_key, []).append(f"is required when {lo_key} is given")
        elif lo is not None and hi <= lo:
            errors.setdefault(hi_key, []).append(f"must be > {lo_key} ({format_number(lo)})")

    def window_extra(*names: str) -> dict[str, list[str]]:
        out: dict[str, list[str]] = {}
        for name in names:
            out[f"{name}_min"] = [f"{name}_max"]
            out[f"{name}_max"] = [f"{name}_min"]
        return out

    def query_activation() -> Choice:
        return Choice(names, spellings=True, required=True, metadata=_d("a built-in activation"))

    class ImageOptionsSchema(StrictSchema):
        """How the image is written: format and resolution."""

        format = Choice(PLOT_FORMATS, metadata=_d(
            "png or svg; when absent the Accept header chooses (image/png, image/svg+xml; png "
            "when both are acceptable or there is no Accept header)"))
        dpi = JSONInteger(validate=Interval(PLOT_DPI_MIN, PLOT_DPI_MAX),
                          load_default=PLOT_DPI_DEFAULT, metadata=_d(
                              "resolution of PNG images in dots per inch (100: 720 x 520 pixels "
                              "for the phase diagram); SVG ignores it"))

    class PhaseDiagramPlotRequestSchema(ImageOptionsSchema):
        """The phase diagram over a sigma_w2 x sigma_b2 grid, as an image."""

        OPENAPI_EXTRA = {"dependentRequired": {"sigma_b2": ["sigma_w2"],
                                               **window_extra("sigma_w2", "sigma_b2")}}

        activation = activation_field()
        sigma_w2 = sigma_w2_field("your point (with sigma_b2): drawn as a star and named in the "
                                  "legend with its phase and xi_c")
        sigma_b2 = sigma_b2_field("bias variance of your point (default 0; needs sigma_w2)")
        sigma_w2_min = sigma_w2_field("left end of the window (with sigma_w2_max); default "
                                      "0.1")
        sigma_w2_max = sigma_w2_field("right end of the window (with sigma_w2_min); default 4, "
                                      "or 1.15 sigma_w2 if that is larger")
        sigma_b2_min = sigma_b2_field("bottom of the window (with sigma_b2_max); default 0")
        sigma_b2_max = sigma_b2_field("top of the window (with sigma_b2_min); default 0.5, or "
                                      "1.15 sigma_b2 if that is larger")
        n_sigma_w2 = axis_points(3, PHASE_GRID_MAX, 41, "grid points along sigma_w2")
        n_sigma_b2 = axis_points(3, PHASE_GRID_MAX, 31, "grid points along sigma_b2")
        depth = JSONInteger(validate=Interval(1, limits.max_depth), metadata=_d(
            "your depth L: the contour 6 xi_c = L is drawn in bold (trainable depth, an "
            "empirical rule of Schoenholz et al. 2017)"))
        q_input = q_input_field(load_default=1.0)

        @validates_schema
        def _window(self, data: dict[str, Any], **kwargs: Any) -> None:
            errors: dict[str, list[str]] = {}
            if data.get("sigma_b2") is not None and data.get("sigma_w2") is None:
                errors["sigma_w2"] = ["is required when sigma_b2 is given (your point is "
                                      "(sigma_w2, sigma_b2))"]
            check_window(data, "sigma_w2", errors)
            check_window(data, "sigma_b2", errors)
            if errors:
                raise ValidationError(errors)

        @post_load
        def _point(self, data: dict[str, Any], **kwargs: Any) -> dict[str, Any]:
            if data.get("sigma_w2") is not None and data.get("sigma_b2") is None:
                data["sigma_b2"] = 0.0  # one canonical request for the same point
            return data

    class PhaseDiagramPlotQuerySchema(PhaseDiagramPlotRequestSchema):
        """Query form of the phase diagram image (built-in names only)."""

        activation = query_activation()

    class VarianceMapPlotRequestSchema(ImageOptionsSchema):
        """The variance map V(q) against q with its fixed points and the iteration, as an image."""

        activation = activation_field()
        sigma_w2 = sigma_w2_field(required=True)
        sigma_b2 = sigma_b2_field(load_default=0.0)
        q_input = q_input_field(load_default=1.0)
        q_max = FiniteNumber(validate=Interval(0, MAP_Q_MAX, low_open=True), metadata=_d(
            "right end of the q axis; default a little beyond the fixed point reached and the "
            "first-layer variance"))
        n_points = axis_points(10, 100_000, 400, "samples of the curve")
        iterations = JSONInteger(validate=Interval(0, PLOT_MAX_ITERATIONS), load_default=12,
                                 metadata=_d("layers of the iteration drawn from the first-layer "
                                             "variance q_1 = sigma_w2 q_input + sigma_b2"))

    class VarianceMapPlotQuerySchema(VarianceMapPlotRequestSchema):
        """Query form of the variance-map image (built-in names only)."""

        activation = query_activation()

    class CorrelationMapPlotRequestSchema(ImageOptionsSchema):
        """The correlation map C(c) at the fixed point q*, with c* and chi_1, as an image."""

        activation = activation_field()
        sigma_w2 = sigma_w2_field(required=True)
        sigma_b2 = sigma_b2_field(load_default=0.0)
        q_input = q_input_field(load_default=1.0)
        c_min = FiniteNumber(validate=Interval(-1, 1, high_open=True), load_default=-1.0,
                             metadata=_d("left end of the c axis"))
        n_points = axis_points(5, 10_000, 101, "samples of the curve (each a 2-D integral)")

    class CorrelationMapPlotQuerySchema(CorrelationMapPlotRequestSchema):
        """Query form of the correlation-map image (built-in names only)."""

        activation = query_activation()

    class DepthScalesPlotRequestSchema(ImageOptionsSchema):
        """xi_q and xi_c against sigma_w2 at a fixed sigma_b2, the edge of chaos marked (image)."""

        OPENAPI_EXTRA = {"dependentRequired": window_extra("sigma_w2")}

        activation = activation_field()
        sigma_b2 = sigma_b2_field("bias variance of the whole curve (and of your point)",
                                  load_default=0.0)
        sigma_w2 = sigma_w2_field("your point (sigma_w2, sigma_b2), marked on the xi_c curve")
        sigma_w2_min = sigma_w2_field("left end of the sigma_w2 axis (with sigma_w2_max); "
                                      "default 0.1")
        sigma_w2_max = sigma_w2_field("right end (with sigma_w2_min); default 4, widened to "
                                      "1.15 times your point and the edge of chaos")
        n_points = axis_points(5, 20_000, 121, "regular samples of sigma_w2 (7 more on each "
                               "side of every critical sigma_w2)")
        xi_max = FiniteNumber(validate=Interval(0, XI_MAX_MAX, low_open=True), metadata=_d(
            "top of the y axis, in layers; default from the curves, between 30 and 10000"))
        depth = JSONInteger(validate=Interval(1, limits.max_depth), metadata=_d(
            "your depth L: the line xi = L / 6 (trainable depth about 6 xi_c, an empirical "
            "rule of Schoenholz et al. 2017)"))
        q_input = q_input_field(load_default=1.0)

        @validates_schema
        def _window(self, data: dict[str, Any], **kwargs: Any) -> None:
            errors: dict[str, list[str]] = {}
            check_window(data, "sigma_w2", errors)
            if errors:
                raise ValidationError(errors)

    class DepthScalesPlotQuerySchema(DepthScalesPlotRequestSchema):
        """Query form of the depth-scales image (built-in names only)."""

        activation = query_activation()

    return {name: value for name, value in locals().items()
            if isinstance(value, type) and issubclass(value, StrictSchema)}
