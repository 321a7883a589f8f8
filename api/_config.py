"""Configuration of the service: defaults, the environment, and the limits.

``create_app(config)`` fills ``app.config`` from :data:`DEFAULTS`, then from
environment variables prefixed ``PROPCALC_`` (values parsed as JSON, e.g.
``PROPCALC_WORK_BUDGET=5000``), then from the ``config`` mapping. The limits
are then checked and frozen into a :class:`Limits` value that the schemas,
the work budget and the OpenAPI document all read, so the document always
states the limits the running service enforces.
"""

from __future__ import annotations

import math
import os
from collections.abc import Mapping
from dataclasses import asdict, dataclass
from typing import Any

from propcalc import SERVICE_FORMULA_LIMITS
from propcalc.domains import DOMAINS as _D

from ._guard import Guard
from ._lane import Lane

__all__ = ["DEFAULTS", "Limits", "limits_from_config", "lane_from_config", "guard_from_config", "VARIANCE_MAX", "MAP_Q_MAX",
           "BIAS_MIN_POSITIVE", "SIGMA_W2_MIN", "Q_STAR_MAX", "Q_STAR_MIN", "PLAN_Q_INPUT_MIN",
           "PARAM_ABS_MAX", "KEEP_RATE_MIN", "MAXOUT_MAX_RANK", "OMEGA_ABS_MAX", "MEAN_ABS_MAX",
           "SMALL_VARIANCE_MIN", "ALPHA_PRIME_ABS_MAX", "SPECTRAL_VARIANCE_MAX", "MAX_CLASSES",
           "LOGIT_VARIANCE_MAX", "MARGIN_MIN", "MARGIN_MAX", "MAX_SAMPLES", "MC_MAX_ELEMENTS",
           "SEED_MAX", "SIMULATION_MAX_WIDTH", "SIMULATION_MAX_REPETITIONS",
           "SIMULATION_MAX_PAIRS", "TOLERANCE_MIN", "PLOT_FORMATS", "PLOT_DPI_MIN", "PLOT_DPI_MAX",
           "PLOT_DPI_DEFAULT", "PHASE_GRID_MAX", "XI_MAX_MAX"]

# Fixed parameter ranges (documented; not configurable). Where the engine documents the
# domain of an input (propcalc.domains), the bound is read from there, never copied. Beyond them the mean-field numbers
# are either meaningless for a real network or outside the engine's tested range.
#: sigma_w2, sigma_b2 and q_input are at most this.
VARIANCE_MAX = _D["sigma_w2"].upper
#: sigma_w2 is at least this (below it the fixed point falls under the engine's search grid).
SIGMA_W2_MIN = _D["sigma_w2"].lower
#: a positive sigma_b2 must be at least this (0 itself is fine): subnormal biases are zero
#: for every practical purpose and only exercise floating-point underflow.
BIAS_MIN_POSITIVE = _D["sigma_b2"].lower
#: q values of the sampled variance and correlation maps are at most this.
MAP_Q_MAX = 1e8
#: q* on the edge-of-chaos line is at most this ...
Q_STAR_MAX = _D["q_star"].upper
#: ... and at least this (below it the critical sigma_b2 underflows to subnormal numbers).
Q_STAR_MIN = _D["q_star"].lower
#: the input mean square of a plan is at least this (the first layer's sigma_w2 is
#: q* / q_input, which must stay finite).
PLAN_Q_INPUT_MIN = 1e-12
#: activation parameters (slope, alpha, beta, formula constants) are at most this in size.
PARAM_ABS_MAX = _D["activation_parameter"].upper
#: dropout and alpha-dropout keep rates lie in [KEEP_RATE_MIN, 1] (keep rate 1: no dropout).
KEEP_RATE_MIN = _D["keep_rate"].lower
#: largest maxout rank (the engine's own bound, propcalc.variants.maxout.MAX_RANK).
MAXOUT_MAX_RANK = int(_D["rank"].upper)
#: |omega| (sum of a unit's incoming weights) of the mean-variance map is at most this ...
OMEGA_ABS_MAX = 100.0
#: ... and so are |mu| of its start and the mean kept by alpha dropout.
MEAN_ABS_MAX = _D["mean"].upper
#: tau, a start variance nu and the variance kept by alpha dropout are at least this (at most
#: VARIANCE_MAX); also the smallest penultimate second moment of the softmax layer.
SMALL_VARIANCE_MIN = _D["variance"].lower
#: |alpha'| (the value of dropped units in alpha dropout) is at most this.
ALPHA_PRIME_ABS_MAX = _D["alpha_prime"].upper
#: target normalised spectral variance of the isometry advice is at most this.
SPECTRAL_VARIANCE_MAX = 1e6
#: most softmax classes (the engine's own bound, propcalc.variants.output_layer.MAX_CLASSES).
MAX_CLASSES = int(_D["n_classes"].upper)
#: largest logit variance (the engine's own bound, propcalc.variants.output_layer.MAX_LOGIT_VARIANCE).
LOGIT_VARIANCE_MAX = 1e4
#: allowed excess of the initial loss over ln K, in nats: [MARGIN_MIN, MARGIN_MAX].
MARGIN_MIN = 1e-6
MARGIN_MAX = 10.0
#: most Monte Carlo draws of the largest class probability ...
MAX_SAMPLES = 10**6
#: ... and of draws times classes (the engine's own bound in propcalc.variants.output_layer).
MC_MAX_ELEMENTS = 5 * 10**7
#: largest seed of the seeded computations (simulation, Monte Carlo).
SEED_MAX = 2**32 - 1
#: a finite-width simulation has width in [2, SIMULATION_MAX_WIDTH] ...
SIMULATION_MAX_WIDTH = 4096
#: ... 2 to SIMULATION_MAX_REPETITIONS networks, 1 to SIMULATION_MAX_PAIRS input pairs each ...
SIMULATION_MAX_REPETITIONS = 1000
SIMULATION_MAX_PAIRS = 256
#: ... and a deviation tolerance in [TOLERANCE_MIN, 1].
TOLERANCE_MIN = 1e-6
#: image formats of the /v1/plots endpoints (propcalc.output.plots.FORMATS) ...
PLOT_FORMATS = ("png", "svg")
#: ... and the resolution of PNG images, in [PLOT_DPI_MIN, PLOT_DPI_MAX] (default 100: the
#: figures are 7.2 x 5.2 or 6.4 x 5.2 inches, so 720 x 520 pixels)
PLOT_DPI_MIN = 50
PLOT_DPI_MAX = 300
PLOT_DPI_DEFAULT = 100
#: points per axis of a phase diagram are at most this (propcalc.output.plots' own bound; also at
#: most MAX_GRID_POINTS)
PHASE_GRID_MAX = 2000
#: the top of the depth-scales axis (xi_max) is at most this
XI_MAX_MAX = 1e8

DEFAULTS: dict[str, Any] = {
    # Flask's own key: larger bodies get 413 before they are read.
    "MAX_CONTENT_LENGTH": 64 * 1024,
    # explicit arrays of q, c or q* values
    "MAX_ARRAY_LENGTH": 2000,
    # generated grids (q_grid, c_grid, q_star_grid: the `num` field)
    "MAX_GRID_POINTS": 2000,
    # layers of a plan (len(widths) - 1, len(layers), or depth)
    "MAX_LAYERS": 1000,
    # the depth of a propagation report (only enters chi_1 ** depth)
    "MAX_DEPTH": 1_000_000,
    # a finite-width simulation: width * width * depth * repetitions (weights drawn)
    "MAX_SIMULATION_SIZE": 20_000_000,
    # typed formulas: the engine's service limits (propcalc.SERVICE_FORMULA_LIMITS)
    "MAX_FORMULA_LENGTH": SERVICE_FORMULA_LIMITS.max_length,
    "MAX_FORMULA_PARAMS": SERVICE_FORMULA_LIMITS.max_parameters,
    # estimated work per request, in work units (1 unit ~ 1 ms of one core; see _budget.py)
    "WORK_BUDGET": 3000.0,
    # wall-clock guard in seconds for one computation, from its admission (0 disables): a
    # backstop for work that waits rather than computes; CPU_TIME_LIMIT bounds the computing
    # (on a loaded machine 3 s of CPU can take 10 s of wall-clock time)
    "WALL_CLOCK_LIMIT": 30.0,
    # CPU seconds one computation's thread may use (0 disables; see _guard.py)
    "CPU_TIME_LIMIT": 6.0,
    # the expensive lane (see _lane.py): estimates of at least EXPENSIVE_UNITS work units
    # hold one of EXPENSIVE_SLOTS slots while they compute; at most EXPENSIVE_QUEUE of them
    # per process wait for one, at most EXPENSIVE_WAIT seconds, else 503 + Retry-After;
    # EXPENSIVE_LOCK_DIR (a directory) shares the slots between the processes of a server
    "EXPENSIVE_UNITS": 500.0,
    "EXPENSIVE_SLOTS": 1,
    "EXPENSIVE_QUEUE": 8,
    "EXPENSIVE_WAIT": 30.0,
    "EXPENSIVE_LOCK_DIR": None,
    # in-process LRU of response bodies
    "RESULT_CACHE_ENTRIES": 512,
    "RESULT_CACHE_BYTES": 32 * 1024 * 1024,
    # in-process LRU of images (PNG/SVG bodies: 40 to 400 kB each), apart from the JSON ones
    "PLOT_CACHE_ENTRIES": 128,
    "PLOT_CACHE_BYTES": 16 * 1024 * 1024,
    # parsed activations (formulas are parsed once)
    "ACTIVATION_CACHE_ENTRIES": 128,
    # load every response body back through its response schema (tests; costs time)
    "VALIDATE_RESPONSES": False,
    # Cache-Control max-age of GET responses, seconds
    "GET_MAX_AGE": 300,
}

_INT_KEYS = ("MAX_CONTENT_LENGTH", "MAX_ARRAY_LENGTH", "MAX_GRID_POINTS", "MAX_LAYERS",
             "MAX_DEPTH", "MAX_SIMULATION_SIZE", "MAX_FORMULA_LENGTH", "MAX_FORMULA_PARAMS",
             "RESULT_CACHE_ENTRIES", "RESULT_CACHE_BYTES", "PLOT_CACHE_ENTRIES",
             "PLOT_CACHE_BYTES", "ACTIVATION_CACHE_ENTRIES", "GET_MAX_AGE", "EXPENSIVE_SLOTS",
             "EXPENSIVE_QUEUE")
# MAX_SIMULATION_SIZE >= 8: the smallest simulation (width 2, depth 1, 2 repetitions)
_MINIMA = {"MAX_CONTENT_LENGTH": 1024, "MAX_ARRAY_LENGTH": 1, "MAX_GRID_POINTS": 2,
           "MAX_LAYERS": 1, "MAX_DEPTH": 1, "MAX_SIMULATION_SIZE": 8, "MAX_FORMULA_LENGTH": 1,
           "MAX_FORMULA_PARAMS": 0, "RESULT_CACHE_ENTRIES": 0, "RESULT_CACHE_BYTES": 0,
           "PLOT_CACHE_ENTRIES": 0, "PLOT_CACHE_BYTES": 0, "ACTIVATION_CACHE_ENTRIES": 0,
           "GET_MAX_AGE": 0, "EXPENSIVE_SLOTS": 1, "EXPENSIVE_QUEUE": 0}


@dataclass(frozen=True)
class Limits:
    """The limits one app enforces (a frozen copy of its configuration).

    Attributes
    ----------
    max_body_bytes : int
        Request bodies larger than this get 413.
    max_array_length : int
        Longest explicit array of q, c or q* values.
    max_grid_points : int
        Largest ``num`` of a generated grid.
    max_layers : int
        Most layers in a plan.
    max_depth : int
        Largest depth of a propagation report.
    max_simulation_size : int
        Largest width * width * depth * repetitions of a finite-width simulation.
    max_formula_length, max_formula_params : int
        Longest formula text, most named formula parameters.
    work_budget : float
        Largest estimated cost of one request, in work units.
    wall_clock_limit : float
        Seconds one computation may run before it is stopped (0: no guard).
    cpu_time_limit : float
        CPU seconds one computation may use before it is stopped (0: no guard).
    expensive_units : float
        Requests estimated at this many work units or more take a slot of the
        expensive lane (at most ``EXPENSIVE_SLOTS`` of them compute at once).
    """

    max_body_bytes: int
    max_array_length: int
    max_grid_points: int
    max_layers: int
    max_depth: int
    max_simulation_size: int
    max_formula_length: int
    max_formula_params: int
    work_budget: float
    wall_clock_limit: float
    cpu_time_limit: float = 0.0
    expensive_units: float = math.inf

    def to_dict(self) -> dict[str, Any]:
        """Plain view, with the fixed parameter ranges (served at /v1/limits)."""
        out: dict[str, Any] = asdict(self)
        if math.isinf(self.expensive_units):
            out["expensive_units"] = None  # no lane
        out["ranges"] = {
            "variance_max": VARIANCE_MAX,
            "sigma_w2_min": SIGMA_W2_MIN,
            "bias_min_positive": BIAS_MIN_POSITIVE,
            "map_q_max": MAP_Q_MAX,
            "q_star_min": Q_STAR_MIN,
            "q_star_max": Q_STAR_MAX,
            "plan_q_input_min": PLAN_Q_INPUT_MIN,
            "param_abs_max": PARAM_ABS_MAX,
            "keep_rate_min": KEEP_RATE_MIN,
            "maxout_max_rank": MAXOUT_MAX_RANK,
            "omega_abs_max": OMEGA_ABS_MAX,
            "mean_abs_max": MEAN_ABS_MAX,
            "small_variance_min": SMALL_VARIANCE_MIN,
            "alpha_prime_abs_max": ALPHA_PRIME_ABS_MAX,
            "spectral_variance_max": SPECTRAL_VARIANCE_MAX,
            "max_classes": MAX_CLASSES,
            "logit_variance_max": LOGIT_VARIANCE_MAX,
            "margin_min": MARGIN_MIN,
            "margin_max": MARGIN_MAX,
            "max_samples": MAX_SAMPLES,
            "mc_max_elements": MC_MAX_ELEMENTS,
            "seed_max": SEED_MAX,
            "simulation_max_width": SIMULATION_MAX_WIDTH,
            "simulation_max_repetitions": SIMULATION_MAX_REPETITIONS,
            "simulation_max_pairs": SIMULATION_MAX_PAIRS,
            "tolerance_min": TOLERANCE_MIN,
            "plot_dpi_min": PLOT_DPI_MIN,
            "plot_dpi_max": PLOT_DPI_MAX,
        }
        return out


def _check_int(key: str, value: Any) -> int:
    if isinstance(value, bool) or not isinstance(value, int):
        raise ValueError(f"config {key} must be an integer, got {value!r}")
    if value < _MINIMA[key]:
        raise ValueError(f"config {key} must be >= {_MINIMA[key]}, got {value!r}")
    return value


def _check_seconds(key: str, value: Any, positive: bool) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise ValueError(f"config {key} must be a finite number, got {value!r}")
    if value < 0 or (positive and value == 0):
        raise ValueError(f"config {key} must be {'> 0' if positive else '>= 0'}, got {value!r}")
    return float(value)


def limits_from_config(config: Mapping[str, Any]) -> Limits:
    """Check the limit keys of ``config`` and return them as :class:`Limits`.

    Raises
    ------
    ValueError
        Naming the key, the constraint and the value, for a bad setting.
    """
    for key in _INT_KEYS:
        _check_int(key, config[key])
    return Limits(
        max_body_bytes=config["MAX_CONTENT_LENGTH"],
        max_array_length=config["MAX_ARRAY_LENGTH"],
        max_grid_points=config["MAX_GRID_POINTS"],
        max_layers=config["MAX_LAYERS"],
        max_depth=config["MAX_DEPTH"],
        max_simulation_size=config["MAX_SIMULATION_SIZE"],
        max_formula_length=config["MAX_FORMULA_LENGTH"],
        max_formula_params=config["MAX_FORMULA_PARAMS"],
        work_budget=_check_seconds("WORK_BUDGET", config["WORK_BUDGET"], positive=True),
        wall_clock_limit=_check_seconds("WALL_CLOCK_LIMIT", config["WALL_CLOCK_LIMIT"],
                                        positive=False),
        cpu_time_limit=_check_seconds("CPU_TIME_LIMIT", config["CPU_TIME_LIMIT"],
                                      positive=False),
        expensive_units=_check_seconds("EXPENSIVE_UNITS", config["EXPENSIVE_UNITS"],
                                       positive=True),
    )


def lane_from_config(config: Mapping[str, Any], limits: Limits) -> Lane:
    """The expensive lane of an app (its settings checked; a bad one raises ValueError)."""
    slots = _check_int("EXPENSIVE_SLOTS", config["EXPENSIVE_SLOTS"])
    queue = _check_int("EXPENSIVE_QUEUE", config["EXPENSIVE_QUEUE"])
    wait = _check_seconds("EXPENSIVE_WAIT", config["EXPENSIVE_WAIT"], positive=False)
    lock_dir = config["EXPENSIVE_LOCK_DIR"]
    if lock_dir is not None and not (isinstance(lock_dir, str) and os.path.isdir(lock_dir)):
        raise ValueError(f"config EXPENSIVE_LOCK_DIR must be an existing directory, got "
                         f"{lock_dir!r}")
    retry_after = max(1, math.ceil(limits.work_budget / 1000.0))  # about one expensive request
    return Lane(slots, queue, wait, retry_after, lock_dir)


def guard_from_config(config: Mapping[str, Any], limits: Limits) -> Guard:
    """The run-time limits of an app: wall clock, CPU time and the expensive lane."""
    return Guard(limits.wall_clock_limit, limits.cpu_time_limit,
                 lane_from_config(config, limits), limits.expensive_units)
