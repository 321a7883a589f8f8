"""The image computations: validated requests in, PNG or SVG bytes out.

No Flask here. Every figure is drawn by :mod:`propcalc.output.plots` (matplotlib's
``Figure`` built directly, never pyplot, so no GUI backend and no global
figure registry) and written by :func:`propcalc.output.plots.save_figure`, whose
bytes are a function of the request: a fixed SVG hash salt, no date or
software metadata, text drawn as paths. Each computation checks its
estimated cost against the work budget (:mod:`propcalc_api._budget`) before
anything is drawn.

matplotlib is imported on first use, so the service runs without the
``plot`` extra and answers these endpoints with 501 until it is installed.

Threads: ``save_figure`` sets matplotlib's rcParams (the SVG hash salt) for
the time of one render, and rcParams are global to the process; figures
are therefore built and rendered under one lock per process: it serialises
the drawing, never the JSON endpoints. The phase diagram and the depth scales
run their sweeps metered (:mod:`propcalc_api._meter`), after taking a slot of
the expensive lane, so that no lane wait happens under the lock.
"""

from __future__ import annotations

import importlib
import math
import threading
from types import ModuleType
from typing import Any

from propcalc import Activation, Propagation, install_hint, propagation

from ._budget import (
    COSTS,
    FORMULA_FACTOR,
    check_budget,
    correlation_point_cost,
    max_points,
    plot_image_cost,
    sweep_point_cost,
)
from ._config import PLOT_DPI_DEFAULT
from ._meter import MeteredExecutor, metered_chunk_size, take_expensive_slot
from ._networks import shape_plot_cost
from ._problems import Problem
from ._service import Computations

__all__ = ["Plots", "MIMETYPES", "FORMAT_OF", "PLOT_EXTRA", "plots_module"]

#: media type of each image format
MIMETYPES = {"png": "image/png", "svg": "image/svg+xml"}
#: image format of each media type
FORMAT_OF = {v: k for k, v in MIMETYPES.items()}
#: how to install the plotting extra
PLOT_EXTRA = install_hint("plot")

_RENDER_LOCK = threading.Lock()


def plots_module() -> ModuleType:
    """:mod:`propcalc.output.plots`, imported on first use (501 when matplotlib is missing)."""
    try:
        return importlib.import_module("propcalc.output.plots")
    except ImportError:
        raise Problem(501, "this service cannot draw images: matplotlib (the 'plot' extra) is "
                      f"not installed where it runs; {PLOT_EXTRA}") from None


def _window(req: dict[str, Any], name: str) -> tuple[float, float] | None:
    lo, hi = req.get(f"{name}_min"), req.get(f"{name}_max")
    return None if lo is None or hi is None else (lo, hi)


def _grid_advice(fits: int, nw: int, nb: int) -> str:
    """'ask for at most 540 grid points, e.g. 26 x 20' (keeping the requested aspect)."""
    if fits < 9:
        return "no grid of at least 3 x 3 points fits: raise WORK_BUDGET"
    scale = math.sqrt(fits / (nw * nb))
    a, b = max(3, int(nw * scale)), max(3, int(nb * scale))
    while a * b > fits:  # the floor of 3 can overshoot
        if a >= b and a > 3:
            a -= 1
        else:
            b -= 1
    while True:  # then grow, keeping the requested aspect as well as integers allow
        grow = [(x, y) for x, y in ((a + 1, b), (a, b + 1)) if x * y <= fits]
        if not grow:
            break
        a, b = min(grow, key=lambda xy: abs(math.log(xy[0] * nb / (xy[1] * nw))))
    return (f"ask for at most {fits} grid points (n_sigma_w2 x n_sigma_b2), e.g. "
            f"{a} x {b}")


class Plots:
    """The images of the service, drawn with the engine's figures.

    Parameters
    ----------
    computations : Computations
        For the activation cache and the work budget.
    """

    def __init__(self, computations: Computations) -> None:
        self.computations = computations

    # -- helpers ----------------------------------------------------------------------------
    @property
    def _budget_units(self) -> float:
        return self.computations.limits.work_budget

    @staticmethod
    def _factor(spec: dict[str, Any]) -> float:
        return FORMULA_FACTOR if "formula" in spec else 1.0

    def _check(self, spec: dict[str, Any], estimate: float, what: str,
               pointer: str | None = None, advice: str = "") -> None:
        check_budget(estimate * self._factor(spec), self._budget_units, what, pointer, advice)

    def _propagation(self, act: Activation, req: dict[str, Any], what: str) -> Propagation:
        self._check(req["activation"], COSTS["propagation"], f"finding the fixed points for {what}")
        return propagation(act, req["sigma_w2"], req["sigma_b2"], q_input=req["q_input"])

    @staticmethod
    def _render(make: Any, fmt: str, dpi: int) -> bytes:
        """Build the figure and write it, under the process's render lock."""
        mod = plots_module()
        with _RENDER_LOCK:
            fig = make(mod)
            return bytes(mod.save_figure(fig, None, fmt,
                                         dpi=float(dpi if fmt == "png" else PLOT_DPI_DEFAULT)))

    # -- the figures ----------------------------------------------------------------------------
    def phase_diagram(self, req: dict[str, Any], fmt: str) -> bytes:
        """The phase diagram over the requested window, with the point and depth if given."""
        spec = req["activation"]
        nw, nb = req["n_sigma_w2"], req["n_sigma_b2"]
        has_point = req.get("sigma_w2") is not None
        plots_module()  # 501 before any work when matplotlib is missing
        act = self.computations.activation(spec)
        factor = self._factor(spec)
        per = sweep_point_cost(act.has_jumps)
        fixed = plot_image_cost(fmt, req["dpi"]) + (COSTS["propagation"] if has_point else 0.0)
        fits = max_points(self._budget_units, fixed * factor, per * factor)
        kind = " (an activation with a jump)" if act.has_jumps else ""
        self._check(spec, fixed + per * nw * nb,
                    f"a phase diagram of {nw} x {nb} grid points{kind}", "/n_sigma_w2",
                    _grid_advice(fits, nw, nb))
        point = (req["sigma_w2"], req["sigma_b2"]) if has_point else None
        take_expensive_slot()
        meter = MeteredExecutor(nw * nb, fixed, self._budget_units, factor,
                                f"a phase diagram of {nw} x {nb} grid points{kind}",
                                "/n_sigma_w2")

        def make(mod: ModuleType) -> Any:
            return mod.plot_phase_diagram(
                act, point, sigma_w2_range=_window(req, "sigma_w2"),
                sigma_b2_range=_window(req, "sigma_b2"), n_grid=(nw, nb),
                q_input=req["q_input"], depth=req.get("depth"), progress=False,
                executor=meter, chunk_size=metered_chunk_size(nw * nb))

        return self._render(make, fmt, req["dpi"])

    def variance_map(self, req: dict[str, Any], fmt: str) -> bytes:
        """V(q) with the identity, the fixed points and the iteration from q_1."""
        spec = req["activation"]
        n, iterations = req["n_points"], req["iterations"]
        plots_module()
        act = self.computations.activation(spec)
        samples = n + iterations
        fixed = plot_image_cost(fmt, req["dpi"]) + COSTS["propagation"]
        per = COSTS["variance_point"]
        fits = max_points(self._budget_units, fixed * self._factor(spec),
                          per * self._factor(spec)) - iterations
        self._check(spec, fixed + per * samples,
                    f"a variance-map image of {n} samples and {iterations} iterations",
                    "/n_points", f"ask for at most {max(fits, 0)} samples")
        prop = self._propagation(act, req, "a variance-map image")

        def make(mod: ModuleType) -> Any:
            return mod.plot_variance_map(act, prop, q_max=req.get("q_max"), n_points=n,
                                         iterations=iterations, q_input=req["q_input"])

        return self._render(make, fmt, req["dpi"])

    def correlation_map(self, req: dict[str, Any], fmt: str) -> bytes:
        """C(c) at q*, with the identity, c* and the slope chi_1 at c = 1."""
        spec = req["activation"]
        n = req["n_points"]
        plots_module()
        act = self.computations.activation(spec)
        image = plot_image_cost(fmt, req["dpi"])
        self._check(spec, image + COSTS["propagation"], "a correlation-map image")
        prop = self._propagation(act, req, "a correlation-map image")
        fixed = image + COSTS["propagation"]
        q = prop.q_star
        if q is not None and q > 0.0:  # else no 2-D integral is computed (see plots)
            per = correlation_point_cost(q, False)
            fits = max_points(self._budget_units, fixed * self._factor(spec),
                              per * self._factor(spec))
            self._check(spec, fixed + per * n,
                        f"a correlation-map image of {n} samples at q* = {q:.6g}", "/n_points",
                        f"ask for at most {fits} samples")

        def make(mod: ModuleType) -> Any:
            return mod.plot_correlation_map(act, prop, c_min=req["c_min"], n_points=n,
                                            q_input=req["q_input"])

        return self._render(make, fmt, req["dpi"])

    def depth_scales(self, req: dict[str, Any], fmt: str) -> bytes:
        """xi_q and xi_c against sigma_w2 at the requested sigma_b2."""
        spec = req["activation"]
        n = req["n_points"]
        has_point = req.get("sigma_w2") is not None
        plots_module()
        act = self.computations.activation(spec)
        factor = self._factor(spec)
        per = sweep_point_cost(act.has_jumps)
        fixed = (plot_image_cost(fmt, req["dpi"]) + COSTS["edge_at_bias"]
                 + COSTS["depth_scales_extra_points"] * per
                 + (COSTS["propagation"] if has_point else 0.0))
        fits = max_points(self._budget_units, fixed * factor, per * factor)
        self._check(spec, fixed + per * n, f"a depth-scales image of {n} samples", "/n_points",
                    f"ask for at most {fits} samples")
        point = (req["sigma_w2"], req["sigma_b2"]) if has_point else None
        take_expensive_slot()
        meter = MeteredExecutor(n + int(COSTS["depth_scales_extra_points"]), fixed,
                                self._budget_units, factor,
                                f"a depth-scales image of {n} samples", "/n_points")

        def make(mod: ModuleType) -> Any:
            return mod.plot_depth_scales(act, point, sigma_b2=req["sigma_b2"],
                                         sigma_w2_range=_window(req, "sigma_w2"), n_points=n,
                                         xi_max=req.get("xi_max"), depth=req.get("depth"),
                                         q_input=req["q_input"], progress=False,
                                         executor=meter,
                                         chunk_size=metered_chunk_size(meter.total_points))

        return self._render(make, fmt, req["dpi"])

    # -- networks and shaping (issues 14 and 16) --------------------------------------------------
    def network(self, req: dict[str, Any], fmt: str) -> bytes:
        """q, c and the gradient against the stream position (propcalc.output.network_plot)."""
        plots_module()
        image = plot_image_cost(fmt, req["dpi"])
        result = self.computations.network_result(req, extra=image,
                                                  per_position=COSTS["network_plot_position"])

        def make(mod: ModuleType) -> Any:
            return importlib.import_module("propcalc.output.network_plot").plot_network(result)

        return self._render(make, fmt, req["dpi"])

    def shape(self, req: dict[str, Any], fmt: str) -> bytes:
        """The network correlation map before and after shaping (propcalc.output.shaping_plot)."""
        plots_module()
        n = req["n_points"]
        extra = plot_image_cost(fmt, req["dpi"]) + shape_plot_cost(req)
        shaped = self.computations.shaped(req, extra=extra)

        def make(mod: ModuleType) -> Any:
            return importlib.import_module("propcalc.output.shaping_plot").plot_shaping(
                shaped, n_points=n)

        return self._render(make, fmt, req["dpi"])
