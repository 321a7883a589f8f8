"""Response schemas of the service itself: problem details, health and limits.

They describe bodies the service assembles (no engine result behind them); the engine results'
schemas are in :mod:`propcalc_api._responses`, which lists these too in ``RESPONSE_SCHEMAS``.
"""

from __future__ import annotations

from typing import Any

from marshmallow import fields

from ._fields import Choice, FiniteNumber, JSONInteger, StrictString
from ._schema_base import StrictSchema, _d, _r

__all__ = ["ProblemEntrySchema", "LimitRefSchema", "ProblemSchema", "HealthSchema",
           "RangesSchema", "LimitsInfoSchema"]


def num(**kw: Any) -> FiniteNumber:
    return _r(FiniteNumber(**kw))


def text(**kw: Any) -> StrictString:
    return _r(StrictString(**kw))


class ProblemEntrySchema(StrictSchema):
    """One bad field: where it is and what is wrong with it."""

    pointer = StrictString(metadata=_d("JSON pointer into the request body"))
    parameter = StrictString(metadata=_d("query parameter name"))
    detail = text()

class LimitRefSchema(StrictSchema):
    """The limit a request ran into."""

    name = text()
    value = num()

class ProblemSchema(StrictSchema):
    """RFC 9457 problem details."""

    type = text(metadata=_d("problem type URI; about:blank for plain HTTP errors"))
    title = text()
    status = _r(JSONInteger())
    detail = text()
    instance = text(metadata=_d("the request path"))
    errors = fields.List(fields.Nested(ProblemEntrySchema))
    limit = fields.Nested(LimitRefSchema)
    estimated_cost = FiniteNumber(metadata=_d("estimated work units of the request"))
    incident = StrictString(metadata=_d("identifier of a logged internal error"))

class HealthSchema(StrictSchema):
    """Liveness."""

    status = _r(Choice(["ok"]))
    service = text()
    version = text()

class RangesSchema(StrictSchema):
    """Fixed parameter ranges."""

    variance_max = num()
    sigma_w2_min = num()
    bias_min_positive = num()
    map_q_max = num()
    q_star_min = num()
    q_star_max = num()
    plan_q_input_min = num()
    param_abs_max = num()
    keep_rate_min = num()
    maxout_max_rank = _r(JSONInteger())
    omega_abs_max = num()
    mean_abs_max = num()
    small_variance_min = num()
    alpha_prime_abs_max = num()
    spectral_variance_max = num()
    max_classes = _r(JSONInteger())
    logit_variance_max = num()
    margin_min = num()
    margin_max = num()
    max_samples = _r(JSONInteger())
    mc_max_elements = _r(JSONInteger())
    seed_max = _r(JSONInteger())
    simulation_max_width = _r(JSONInteger())
    simulation_max_repetitions = _r(JSONInteger())
    simulation_max_pairs = _r(JSONInteger())
    tolerance_min = num()
    plot_dpi_min = _r(JSONInteger())
    plot_dpi_max = _r(JSONInteger())

class LimitsInfoSchema(StrictSchema):
    """The limits this service enforces."""

    max_body_bytes = _r(JSONInteger())
    max_array_length = _r(JSONInteger())
    max_grid_points = _r(JSONInteger())
    max_layers = _r(JSONInteger())
    max_depth = _r(JSONInteger())
    max_simulation_size = _r(JSONInteger())
    max_formula_length = _r(JSONInteger())
    max_formula_params = _r(JSONInteger())
    work_budget = num()
    wall_clock_limit = num()
    cpu_time_limit = num()
    expensive_units = num(allow_none=True)
    ranges = _r(fields.Nested(RangesSchema))
