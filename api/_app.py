"""The application factory."""

from __future__ import annotations

import logging
from collections.abc import Mapping
from typing import Any

from flask import Flask

from ._cache import LRUCache
from ._config import DEFAULTS, guard_from_config, limits_from_config
from ._json import StrictJSONProvider
from ._openapi import build_openapi
from ._plots import Plots
from ._problems import handle_exception
from ._routes import ServiceState, make_blueprint
from ._schemas import build_schemas
from ._service import Computations

__all__ = ["create_app"]


def create_app(config: Mapping[str, Any] | None = None) -> Flask:
    """Build the propcalc HTTP service.

    Parameters
    ----------
    config : mapping, optional
        Settings that override, in this order, :data:`propcalc_api._config.DEFAULTS`
        and environment variables ``PROPCALC_<KEY>`` (values parsed as JSON,
        e.g. ``PROPCALC_WORK_BUDGET=5000``). Keys: MAX_CONTENT_LENGTH,
        MAX_ARRAY_LENGTH, MAX_GRID_POINTS, MAX_LAYERS, MAX_DEPTH,
        MAX_SIMULATION_SIZE, MAX_FORMULA_LENGTH, MAX_FORMULA_PARAMS, WORK_BUDGET, WALL_CLOCK_LIMIT,
        CPU_TIME_LIMIT, EXPENSIVE_UNITS, EXPENSIVE_SLOTS, EXPENSIVE_QUEUE, EXPENSIVE_WAIT,
        EXPENSIVE_LOCK_DIR, RESULT_CACHE_ENTRIES, RESULT_CACHE_BYTES, PLOT_CACHE_ENTRIES, PLOT_CACHE_BYTES,
        ACTIVATION_CACHE_ENTRIES, VALIDATE_RESPONSES, GET_MAX_AGE, and any Flask setting.

    Returns
    -------
    flask.Flask

    Raises
    ------
    ValueError
        If a limit is not a valid setting (the message names it).

    Examples
    --------
    >>> from propcalc_api import create_app
    >>> app = create_app({"WORK_BUDGET": 1000})
    >>> app.test_client().get("/health").status_code
    200
    """
    app = Flask("propcalc_api", static_folder=None)
    app.config.from_mapping(DEFAULTS)
    app.config.from_prefixed_env("PROPCALC")
    if config:
        app.config.from_mapping(config)
    limits = limits_from_config(app.config)
    guard = guard_from_config(app.config, limits)
    app.json = StrictJSONProvider(app)
    schemas = build_schemas(limits)
    computations = Computations(limits, app.config["ACTIVATION_CACHE_ENTRIES"])
    st = ServiceState(
        limits=limits,
        schemas=schemas,
        computations=computations,
        results=LRUCache(app.config["RESULT_CACHE_ENTRIES"], app.config["RESULT_CACHE_BYTES"]),
        validate_responses=bool(app.config["VALIDATE_RESPONSES"]),
        get_max_age=app.config["GET_MAX_AGE"],
        plots=Plots(computations),
        images=LRUCache(app.config["PLOT_CACHE_ENTRIES"], app.config["PLOT_CACHE_BYTES"]),
        guard=guard,
    )
    app.extensions["propcalc_api"] = st
    app.register_blueprint(make_blueprint())
    app.register_error_handler(Exception, handle_exception)
    st.openapi = build_openapi(app, schemas, limits)
    logging.getLogger("propcalc_api").setLevel(logging.INFO)
    return app
