"""The views of the endpoints of :data:`~propcalc_api._endpoints.ENDPOINTS` and the blueprint.

Views are thin: read the body or the query, load it through the request
schema, look the canonical request up in the result cache, else run the
computation under the wall-clock guard, and send canonical JSON with an
ETag. The image endpoints do the same with PNG or SVG bytes (the format
from the request or the Accept header) and their own cache. Errors are
raised, never built here (see :mod:`propcalc_api._problems`).
"""

from __future__ import annotations

import hashlib
import re
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

from flask import Blueprint, Response, current_app, g, request
from marshmallow import Schema, ValidationError

import propcalc
from propcalc import builtin_names

from ._budget import run_guarded
from ._cache import LRUCache
from ._config import PLOT_DPI_DEFAULT, Limits
from ._endpoints import ENDPOINTS, Endpoint
from ._guard import Guard
from ._json import canonical_dumps, strict_loads
from ._plots import FORMAT_OF, MIMETYPES, Plots
from ._problems import TYPE_INVALID_FIELDS, ErrorContext, Problem
from ._schemas import Schemas
from ._service import Computations

__all__ = ["BLUEPRINT", "Endpoint", "ENDPOINTS", "ServiceState", "make_blueprint", "state",
           "negotiate_format"]

#: name of the blueprint (Flask endpoint names are "propcalc_api.<name>")
BLUEPRINT = "propcalc_api"



_NUMBER = re.compile(r"-?(?:0|[1-9][0-9]*)(?:\.[0-9]+)?(?:[eE][+-]?[0-9]+)?")


@dataclass
class ServiceState:
    """Everything one app holds (``app.extensions["propcalc_api"]``)."""

    limits: Limits
    schemas: Schemas
    computations: Computations
    results: LRUCache[bytes]
    validate_responses: bool
    get_max_age: int
    plots: Plots | None = None
    images: LRUCache[bytes] | None = None
    openapi: bytes = b""
    schema_instances: dict[type[Schema], Schema] = field(default_factory=dict)
    guard: Guard = field(default_factory=lambda: Guard(0.0, 0.0))


def state() -> ServiceState:
    """The current app's :class:`ServiceState`."""
    return current_app.extensions["propcalc_api"]


# ---------------------------------------------------------------------------------------------
# reading requests
# ---------------------------------------------------------------------------------------------
def _read_json_object() -> dict[str, Any]:
    mimetype = request.mimetype
    if mimetype != "application/json":
        got = request.headers.get("Content-Type")
        raise Problem(415, "Content-Type must be application/json, got "
                      + (repr(got) if got else "none"))
    charset = request.mimetype_params.get("charset")
    if charset is not None and charset.lower() not in ("utf-8", "utf8"):
        raise Problem(415, f"JSON bodies are UTF-8, got charset={charset!r}")
    limit = current_app.config["MAX_CONTENT_LENGTH"]
    if request.content_length is not None and request.content_length > limit:
        raise Problem(413, f"the request body is {request.content_length} bytes; the limit is "
                      f"{limit} bytes (MAX_CONTENT_LENGTH)",
                      extra={"limit": {"name": "MAX_CONTENT_LENGTH", "value": limit}})
    data = request.get_data(cache=True)
    if request.content_length is None and len(data) >= limit:
        # a chunked body is cut at the limit by werkzeug, which cannot tell whether more
        # followed: refuse it rather than parse a truncated body
        raise Problem(413, f"the chunked request body reached the limit of {limit} bytes "
                      "(MAX_CONTENT_LENGTH)",
                      extra={"limit": {"name": "MAX_CONTENT_LENGTH", "value": limit}})
    if not data.strip():
        raise Problem(400, "the body is empty: send a JSON object")
    body = strict_loads(data)
    if not isinstance(body, dict):
        kind = {list: "an array", str: "a string", bool: "a boolean", type(None): "null"}.get(
            type(body), "a number")
        raise Problem(400, f"the body must be a JSON object, got {kind}")
    return body


def _query_value(text: str) -> Any:
    if _NUMBER.fullmatch(text):
        return int(text) if re.fullmatch(r"-?[0-9]+", text) else float(text)
    return text


def _read_query() -> dict[str, Any]:
    out: dict[str, Any] = {}
    for key in request.args:
        values = request.args.getlist(key)
        if len(values) > 1:
            raise Problem(422, "a query parameter is repeated", type=TYPE_INVALID_FIELDS,
                          title="The request has invalid members",
                          errors=[{"parameter": key, "detail": "is given more than once"}])
        out[key] = _query_value(values[0])
    return out


def _schema(schema_cls: type[Schema]) -> Schema:
    """One instance per schema class and app (loading does not change a schema)."""
    cache = state().schema_instances
    schema = cache.get(schema_cls)
    if schema is None:
        schema = cache[schema_cls] = schema_cls()
    return schema


def _load(schema_cls: type[Schema], raw: dict[str, Any], query: bool = False) -> dict[str, Any]:
    schema = _schema(schema_cls)
    g.error_context = ErrorContext(set(schema.load_fields), raw, query=query)
    return schema.load(raw)


# ---------------------------------------------------------------------------------------------
# responding
# ---------------------------------------------------------------------------------------------
def _etag(body: bytes) -> str:
    return hashlib.sha256(body).hexdigest()[:32]


def _respond(key: tuple[str, str], compute: Callable[[], Any], response_schema: type[Schema],
             conditional: bool) -> Response:
    st = state()
    body = st.results.get(key)
    hit = body is not None
    if body is None:
        result = run_guarded(st.guard, compute)
        if st.validate_responses:
            try:
                _schema(response_schema).load(result)
            except ValidationError as err:  # the body does not match its documented schema
                raise RuntimeError(f"response of {key[0]} does not match "
                                   f"{response_schema.__name__}: {err.messages}") from None
        body = (canonical_dumps(result) + "\n").encode("ascii")
        st.results.put(key, body)
    return _send(body, conditional, "hit" if hit else "miss")


def _send(body: bytes, conditional: bool, cache: str | None = None) -> Response:
    resp = Response(body, status=200, mimetype="application/json")
    resp.set_etag(_etag(body))
    if cache is not None:
        resp.headers["X-Propcalc-Cache"] = cache
    if conditional:
        resp.headers["Cache-Control"] = f"public, max-age={state().get_max_age}"
        resp.make_conditional(request)
    return resp


# ---------------------------------------------------------------------------------------------
# images
# ---------------------------------------------------------------------------------------------
def negotiate_format(requested: str | None) -> str:
    """The image format: the ``format`` member if given, else the best of the Accept header.

    No Accept header (or ``*/*``) gives PNG. Raises a 406 problem when the
    Accept header allows neither image/png nor image/svg+xml, or not the
    format asked for.
    """
    accept = request.accept_mimetypes
    header = request.headers.get("Accept", "")
    offered = ", ".join(MIMETYPES.values())
    if requested is not None:
        mimetype = MIMETYPES[requested]
        if accept and accept.quality(mimetype) <= 0:
            raise Problem(406, f"format {requested!r} is {mimetype}, which the Accept header "
                          f"{header[:120]!r} does not allow; this operation answers {offered}")
        return requested
    if not accept:
        return "png"
    best = accept.best_match(list(MIMETYPES.values()))
    if best is None:
        raise Problem(406, f"the Accept header {header[:120]!r} allows "
                      f"neither of the image types this operation answers ({offered}); accept "
                      "one of them or give format (png or svg)")
    return FORMAT_OF[best]


def _send_image(body: bytes, fmt: str, slug: str, conditional: bool, cache: str) -> Response:
    resp = Response(body, status=200, mimetype=MIMETYPES[fmt])
    resp.set_etag(_etag(body))
    resp.headers["X-Propcalc-Cache"] = cache
    resp.headers["Vary"] = "Accept"
    resp.headers["Content-Disposition"] = f'inline; filename="{slug}.{fmt}"'
    if conditional:
        resp.headers["Cache-Control"] = f"public, max-age={state().get_max_age}"
        resp.make_conditional(request)
    return resp


def _image_view(ep: Endpoint) -> Callable[..., Response]:
    def view() -> Response:
        st = state()
        schemas = st.schemas
        if ep.request is not None:
            req = _load(getattr(schemas, ep.request), _read_json_object())
        else:
            req = _load(getattr(schemas, str(ep.query)), _read_query(), query=True)
            req = _schema(getattr(schemas, str(ep.body_of_query))).load(req)
        fmt = negotiate_format(req.pop("format", None))
        if fmt == "svg":
            req["dpi"] = PLOT_DPI_DEFAULT  # SVG ignores the resolution: one canonical request
        key = (str(ep.compute), fmt, canonical_dumps(req))
        assert st.plots is not None and st.images is not None
        body = st.images.get(key)
        hit = body is not None
        if body is None:
            fn = getattr(st.plots, str(ep.compute))
            body = run_guarded(st.guard, lambda: fn(req, fmt))
            st.images.put(key, body)
        return _send_image(body, fmt, ep.rule.rsplit("/", 1)[1], ep.method == "GET",
                           "hit" if hit else "miss")

    view.__name__ = ep.name
    return view


# ---------------------------------------------------------------------------------------------
# views
# ---------------------------------------------------------------------------------------------
def _generic_view(ep: Endpoint) -> Callable[..., Response]:
    def view() -> Response:
        st = state()
        schemas = st.schemas
        if ep.request is not None:
            req = _load(getattr(schemas, ep.request), _read_json_object())
        elif ep.query is not None:
            req = _load(getattr(schemas, ep.query), _read_query(), query=True)
            # the body form's canonical request: GET and POST share cache entries and bytes
            req = _schema(getattr(schemas, str(ep.body_of_query))).load(req)
        else:
            _load(_EmptyQuery, _read_query(), query=True)
            req = {}
        fn = getattr(st.computations, str(ep.compute))
        call: Callable[[], Any] = fn if ep.request is None and ep.query is None else (
            lambda: fn(req))
        key = (str(ep.compute), canonical_dumps(req))
        return _respond(key, call, getattr(schemas, ep.response), conditional=ep.method == "GET")

    view.__name__ = ep.name
    return view


class _EmptyQuery(Schema):
    """No query parameters."""

    class Meta:
        unknown = "raise"

    error_messages = {"unknown": "is not a query parameter of this operation"}


def _activation_one(name: str) -> Response:
    st = state()
    _load(_EmptyQuery, _read_query(), query=True)
    if name not in builtin_names():
        raise Problem(404, f"no built-in activation named {name[:40]!r}; built-ins are: "
                      f"{', '.join(builtin_names())}; for a formula use POST /v1/describe")
    req = {"activation": {"name": name, "params": {}}}
    return _respond(("describe", canonical_dumps(req)), lambda: st.computations.describe(req),
                    st.schemas.Activation, conditional=True)


def _health() -> Response:
    body = canonical_dumps({"status": "ok", "service": "propcalc", "version":
                            propcalc.__version__}) + "\n"
    resp = Response(body, status=200, mimetype="application/json")
    resp.headers["Cache-Control"] = "no-store"
    return resp


def _limits() -> Response:
    _load(_EmptyQuery, _read_query(), query=True)
    body = (canonical_dumps(state().limits.to_dict()) + "\n").encode("ascii")
    return _send(body, conditional=True)


def _openapi() -> Response:
    return _send(state().openapi, conditional=True)


def make_blueprint() -> Blueprint:
    """The blueprint with every route of :data:`ENDPOINTS` and /openapi.json."""
    bp = Blueprint(BLUEPRINT, __name__)
    special: dict[str, Callable[..., Response]] = {
        "health": _health, "limits": _limits, "activation_one": _activation_one}
    for ep in ENDPOINTS:
        view = special.get(ep.name) or (_image_view(ep) if ep.image else _generic_view(ep))
        bp.add_url_rule(ep.rule, endpoint=ep.name, view_func=view, methods=[ep.method])
    bp.add_url_rule("/openapi.json", endpoint="openapi", view_func=_openapi, methods=["GET"])
    return bp
