"""The per-request work budget: estimate the cost first, refuse what is too large.

Costs are in *work units*, about one millisecond of one core of the machine
the coefficients were measured on (a shared 2-core server; the estimates sit
above the slowest built-in activation measured there, so most requests take
far less than their estimate). A request whose estimate exceeds
``WORK_BUDGET`` (3000 units by default) is refused with 422
``work-budget-exceeded`` before any expensive work starts; the problem names
the limit and how much smaller the request must be. An admitted request
records its estimate on its ticket (:mod:`propcalc_api._guard`), which puts
it in the expensive lane when the estimate reaches ``EXPENSIVE_UNITS``
(:mod:`propcalc_api._lane`). ``tests/api/test_api_costs.py`` checks that the
measured CPU cost of every endpoint at its limits is at most twice its
estimate.

The estimates (measured per point, common practice, no source):

==========================  =====================================================
request                     estimated units
==========================  =====================================================
activation list             50 per built-in (once; then cached)
one activation              50
propagation report          200
critical point              5
edge-of-chaos line          10 + 1 per q* value; 150 at a fixed sigma_b2
plan                        300 + 0.05 per layer; with a loss + 200 + 3 per
                            layer (the tangent kernel: relu 2.5 ms per layer)
                            + the Monte Carlo term of the softmax below for
                            the readout (cross_entropy, 100000 draws)
variance map                0.5 per q value
correlation map             k(q) per c value, 3 k(q) more with the slope,
                            k(q) = 6 * 2 ** (log10(max(q, 1)) / 2); plus 200
                            when q* must be found first
dropout report              300 per keep rate (a sweep: per keep rate)
maxout report               10
mean-variance fixed points  30 with omega = 0; 1500 otherwise (a root finder
                            from six starts: up to about 2 s for the piecewise
                            linear built-ins, under 0.4 s for smooth ones)
alpha dropout               1
Jacobian spectrum           10
isometry advice             150
softmax loss                20 + 12 sqrt(logit_variance), plus the largest
                            probability: 10 for K = 2 (quadrature), else
                            5 + 3e-5 n_samples K (Monte Carlo)
softmax output scale        250 + 100 margin, plus the Monte Carlo term above
simulation                  50 + 1.5 depth (mean-field trajectory)
                            + 0.1 depth repetitions
                            + 3e-5 width^2 depth repetitions (1 + n_pairs / 100);
                            refused first if width^2 depth repetitions exceeds
                            MAX_SIMULATION_SIZE
one image (any figure)      300 to build and render it (PNG at 100 dpi or SVG),
                            plus 40 ((dpi / 100)^2 - 1) for PNG above 100 dpi
phase diagram               the image + 1 per grid point (5 for an activation
                            with a jump, such as step) + 200 with a point
variance-map image          the image + 200 + 0.5 per sample and per
                            iteration drawn
correlation-map image       the image + 200 + k(q*) per sample (as above)
depth-scales image          the image + 150 (the critical sigma_w2) + the
                            per-point cost of the phase diagram for
                            n_points + 28 samples + 200 with a point
network propagation        200 + 1.5 per unit of the engine's Network.cost (one
                            per activation block met, three where positions mix,
                            30 + 0.012 tokens per attention block whose logits
                            spread, 0.02 per other block: an upper bound), twice per unit
                            with typed formulas; plus 50 per distinct formula
                            (read first); plus, where the Gaussian recursion
                            stops holding and the simulation is asked for,
                            0.6 per position and repetition + 5e-7 per
                            multiply-add of the simulated networks
network plan                300 + 2.5 per unit; 40 per unit with a target
                            (the branch-weight search)
network with a loss         + 50 + 1.5 per unit (the tangent kernel's walk);
                            cross_entropy + 150 + 1 per class + the softmax
                            curvature: 5e-6 K^3 (K <= 1000), else 3e-5 per
                            draw of 20000 K; twice with a plan (the planned
                            network's ceiling)
network image               the image + the propagation + 0.2 per position
shaping                     400 + 1.5 per layer (twice for a formula; elu by
                            deep kernel shaping: 2.1 ms per layer); 0.05 per
                            layer for the leaky slope form (relu, leaky_relu
                            by tat: closed forms)
shaping image               the image + the shaping + (8 + 0.1 n_points) per
                            layer (ten times for a formula: its composed
                            maps are 2-D integrals, 0.75 ms per point and
                            layer); 0.1 per layer for the leaky slope form
==========================  =====================================================

The per-point cost of a phase diagram is its typical cost over the default
window (sigma_w2 in [0.1, 4], sigma_b2 in [0, 0.5]): measured between 0.07 and
1.3 ms per point for the built-ins without a jump (tanh 0.35, hard_tanh 1.26)
and 3 to 4.4 ms for step. It is not a bound: windows where c* lies very close
to 1 cost 10 to 35 ms per point, so the phase diagram and the depth scales are
metered while they run (:mod:`propcalc_api._meter`).

Activations given as formulas cost twice as much (``FORMULA_FACTOR``).

As a second line of defence, :func:`run_guarded` runs every computation
under the watchdog of :mod:`propcalc_api._guard`, which stops it after
``CPU_TIME_LIMIT`` seconds of CPU or ``WALL_CLOCK_LIMIT`` seconds of wall-clock
time, in any thread; and it turns every failure of the engine into a problem
document (422 or 503), never a 500.
"""

from __future__ import annotations

import logging
import math
import uuid
from collections.abc import Callable
from typing import Any, TypeVar

from marshmallow import ValidationError

from propcalc import PropcalcError

from ._fields import format_number
from ._guard import Guard, Ticket, current_ticket
from ._guard import run_guarded as _run
from ._lane import LaneBusy
from ._problems import TYPE_COMPUTATION, Problem, WorkBudgetExceeded

__all__ = [
    "COSTS",
    "FORMULA_FACTOR",
    "busy_problem",
    "check_budget",
    "correlation_point_cost",
    "first_nonfinite",
    "initial_loss_cost",
    "max_points",
    "max_probability_cost",
    "plot_image_cost",
    "run_guarded",
    "simulation_cost",
    "sweep_point_cost",
]

_log = logging.getLogger("propcalc_api")

T = TypeVar("T")

FORMULA_FACTOR = 2.0
COSTS = {
    "activation": 50.0,
    "propagation": 200.0,
    "critical_point": 5.0,
    "edge_base": 10.0,
    "edge_point": 1.0,
    "edge_at_bias": 150.0,
    "plan": 300.0,
    "plan_layer": 0.05,
    "plan_loss": 200.0,
    "plan_loss_layer": 3.0,
    "variance_point": 0.5,
    "correlation_base": 6.0,
    "correlation_growth": 0.5,
    "correlation_slope_factor": 3.0,
    "dropout_rate": 300.0,
    "maxout": 10.0,
    "selfnorm_omega_zero": 30.0,
    "selfnorm_root_finder": 1500.0,
    "alpha_dropout": 1.0,
    "jacobian_spectrum": 10.0,
    "isometry": 150.0,
    "softmax_loss_base": 20.0,
    "softmax_loss_sqrt": 12.0,
    "softmax_pmax_quadrature": 10.0,
    "softmax_pmax_base": 5.0,
    "softmax_pmax_element": 3e-5,
    "output_scale_base": 250.0,
    "output_scale_margin": 100.0,
    "simulation_base": 50.0,
    "simulation_layer": 1.5,
    "simulation_layer_repetition": 0.1,
    "simulation_layer_repetition_pair": 6e-4,
    "simulation_element": 3e-5,
    "simulation_pairs_scale": 100.0,
    "plot_image": 300.0,
    "plot_png_dpi": 40.0,
    "sweep_point": 1.0,
    "sweep_point_jumps": 5.0,
    "depth_scales_extra_points": 28.0,
    "network": 200.0,
    "network_unit": 1.5,
    "network_plan": 300.0,
    "network_plan_unit": 2.5,
    "network_plan_target_unit": 40.0,
    "network_plan_readout_unit": 0.3,
    "network_simulation_position": 0.6,
    "network_simulation_element": 5e-7,
    "shape": 400.0,
    "shape_layer": 1.5,
    "shape_slope_layer": 0.05,
    "shape_slope_plot_layer": 0.1,
    "network_plot_position": 0.2,
    "network_loss": 50.0,
    "network_loss_cross_entropy": 150.0,
    "network_loss_class": 1.0,
    "softmax_curvature_cubic": 5e-6,
    "softmax_curvature_draw": 3e-5,
    "shape_plot_layer": 8.0,
    "shape_plot_point_layer": 0.1,
    "shape_plot_formula_factor": 10.0,
}


def correlation_point_cost(q: float, with_slope: bool) -> float:
    """Estimated units for one c value of the correlation map at variance q."""
    k = COSTS["correlation_base"] * 2.0 ** (COSTS["correlation_growth"]
                                            * math.log10(max(q, 1.0)))
    return k * (1.0 + (COSTS["correlation_slope_factor"] if with_slope else 0.0))


def plot_image_cost(fmt: str, dpi: float) -> float:
    """Estimated units to build and render one figure (PNG grows with the pixel count)."""
    extra = max(0.0, (dpi / 100.0) ** 2 - 1.0) if fmt == "png" else 0.0
    return COSTS["plot_image"] + COSTS["plot_png_dpi"] * extra


def sweep_point_cost(has_jumps: bool) -> float:
    """Estimated units per grid point of a sweep (phase diagram, depth scales)."""
    return COSTS["sweep_point_jumps"] if has_jumps else COSTS["sweep_point"]


def initial_loss_cost(logit_variance: float) -> float:
    """Estimated units of the expected initial loss (its panels grow like sqrt(s2))."""
    return COSTS["softmax_loss_base"] + COSTS["softmax_loss_sqrt"] * math.sqrt(logit_variance)


def max_probability_cost(n_classes: int, logit_variance: float, n_samples: int) -> float:
    """Estimated units of E[max p]: quadrature for K = 2, else n_samples * K draws."""
    if logit_variance == 0.0:
        return 0.0
    if n_classes == 2:
        return COSTS["softmax_pmax_quadrature"]
    return COSTS["softmax_pmax_base"] + COSTS["softmax_pmax_element"] * n_samples * n_classes


def simulation_cost(width: int, depth: int, repetitions: int, n_pairs: int) -> float:
    """Estimated units of a finite-width simulation (see the table above)."""
    size = float(width) * width * depth * repetitions
    pairs = 1.0 + n_pairs / COSTS["simulation_pairs_scale"]
    return (COSTS["simulation_base"] + COSTS["simulation_layer"] * depth
            + COSTS["simulation_layer_repetition"] * depth * repetitions
            + COSTS["simulation_layer_repetition_pair"] * depth * repetitions * n_pairs
            + COSTS["simulation_element"] * size * pairs)


def max_points(budget: float, fixed: float, per_point: float) -> int:
    """How many points fit in the budget beside a fixed cost."""
    return max(0, int((budget - fixed) // per_point))


def check_budget(estimate: float, budget: float, what: str, pointer: str | None = None,
                 advice: str = "") -> None:
    """Raise :class:`WorkBudgetExceeded` if ``estimate`` > ``budget``.

    Parameters
    ----------
    estimate : float
        Estimated work units of the request.
    budget : float
        ``WORK_BUDGET``.
    what : str
        The request in words ("a correlation map of 900 points at q = 1").
    pointer : str, optional
        The member to shrink.
    advice : str
        How to fit ("send at most 480 c values").
    """
    if estimate <= budget:
        ticket = current_ticket()
        if ticket is not None:
            try:
                ticket.record(estimate)  # may wait for a slot of the expensive lane
            except LaneBusy as busy:
                raise busy_problem(busy) from None
        return
    detail = (f"{what} needs an estimated {format_number(round(estimate))} work units "
              f"(about {estimate / 1000:.1f} s of CPU); the limit is "
              f"{format_number(budget)} (WORK_BUDGET)")
    if advice:
        detail += f": {advice}"
    entry = f"too much work for one request ({what}){': ' + advice if advice else ''}"
    raise WorkBudgetExceeded(detail, "WORK_BUDGET", budget, estimate=estimate, pointer=pointer,
                             entry=entry)


def _stopped(ticket: Ticket) -> WorkBudgetExceeded:
    g = ticket.guard
    if ticket.stopped == "cpu":
        return WorkBudgetExceeded(
            f"the computation was stopped after {format_number(g.cpu_seconds)} s of CPU time "
            "(CPU_TIME_LIMIT); ask for fewer points or simpler parameters",
            "CPU_TIME_LIMIT", g.cpu_seconds, estimate=ticket.estimate or None)
    return WorkBudgetExceeded(
        f"the computation was stopped after {format_number(g.wall_seconds)} s of wall-clock time "
        "(WALL_CLOCK_LIMIT); ask for fewer points or simpler parameters",
        "WALL_CLOCK_LIMIT", g.wall_seconds, estimate=ticket.estimate or None)


def busy_problem(busy: LaneBusy) -> Problem:
    """The 503 answer when the expensive lane is full (with ``Retry-After``)."""
    return Problem(503, str(busy), title="The service is busy",
                   headers={"Retry-After": str(busy.retry_after)},
                   extra={"retry_after": busy.retry_after})


def first_nonfinite(value: Any) -> str | None:
    """Where the first NaN or infinite float of a JSON-ready value is ("/chi_c"), or None.

    The JSON form writes infinities as the strings "inf"/"-inf", so a float
    that is not finite is an engine failure, never a result.
    """
    stack: list[tuple[Any, str]] = [(value, "")]
    while stack:
        item, where = stack.pop()
        if isinstance(item, float):
            if not math.isfinite(item):
                return where or "/"
        elif isinstance(item, dict):
            stack.extend((v, f"{where}/{k}") for k, v in item.items())
        elif isinstance(item, (list, tuple)):
            stack.extend((v, f"{where}/{i}") for i, v in enumerate(item))
    return None


def _failed(detail: str, exc: BaseException | None) -> Problem:
    incident = uuid.uuid4().hex[:16]
    _log.error("computation failed (incident %s): %s", incident, detail,
               exc_info=(type(exc), exc, exc.__traceback__) if exc is not None else None)
    return Problem(422, f"{detail}; it has been logged as incident {incident}",
                   type=TYPE_COMPUTATION,
                   title="The computation could not produce a trustworthy result",
                   extra={"incident": incident})


def _from_engine(exc: BaseException) -> bool:
    """True if the exception passed through the engine (a frame of a ``propcalc.`` module)."""
    tb = exc.__traceback__
    while tb is not None:
        name = str(tb.tb_frame.f_globals.get("__name__", ""))
        if name == "propcalc" or name.startswith("propcalc."):
            return True
        tb = tb.tb_next
    return False


def _checked(fn: Callable[[], T]) -> Callable[[], T]:
    """``fn`` with every failure of the engine turned into a problem (never a 500).

    Errors the handler already words (problems, validation and PropcalcError)
    pass through; MemoryError is a 503 (the worker could not hold this
    request); any other exception that passed through the engine (a NaN
    refused by :func:`propcalc.jsonable`, a ZeroDivisionError deep in a
    quadrature...), and a result with a NaN or an infinite float, is a 422
    ``computation-failed`` logged with an incident id. An exception raised by
    the service's own code alone stays a 500: that is a bug of the service.
    """

    def run() -> T:
        try:
            result = fn()
        except (Problem, ValidationError, PropcalcError):
            raise
        except MemoryError:
            raise Problem(503, "this request needed more memory than the service can give "
                          "it; ask for fewer points", headers={"Retry-After": "60"}) from None
        except RecursionError as exc:
            raise _failed("the engine could not evaluate these inputs (too deeply nested)",
                          exc) from None
        except Exception as exc:
            if not _from_engine(exc):
                raise
            raise _failed(f"the engine failed on these inputs ({type(exc).__name__})",
                          exc) from None
        where = first_nonfinite(result)
        if where is not None:
            raise _failed(f"the engine produced a non-finite number at {where} for these "
                          "inputs", None)
        return result

    return run


def run_guarded(guard: Guard | float, fn: Callable[[], T]) -> T:
    """Run ``fn()`` under the limits of ``guard`` (see :mod:`propcalc_api._guard`).

    Parameters
    ----------
    guard : Guard or float
        The app's limits; a number is a wall-clock limit alone (seconds, 0: none).
    fn : callable
        The computation.

    Raises
    ------
    WorkBudgetExceeded
        When the watchdog stopped it (422, ``limit`` = WALL_CLOCK_LIMIT or CPU_TIME_LIMIT).
    Problem
        503 with ``Retry-After`` when the expensive lane is full (raised by
        :func:`check_budget` inside the computation) or memory ran out; 422
        ``computation-failed`` when the engine raised something other than a
        PropcalcError or returned a NaN or an infinite float (logged with an
        incident id): client input never gets a 500.
    """
    if not isinstance(guard, Guard):
        guard = Guard(wall_seconds=float(guard), cpu_seconds=0.0)
    return _run(guard, _checked(fn), on_stop=_stopped)
