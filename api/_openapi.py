"""The OpenAPI 3.1 document, generated with apispec from the app's marshmallow schemas.

Generated once per app (in ``create_app``) from :data:`~propcalc_api._endpoints.ENDPOINTS`
and the same schema classes that validate requests, so the limits it states
are the ones the service enforces. Every operation lists its error
responses; all of them are ``application/problem+json``.
"""

from __future__ import annotations

from typing import Any

from apispec import APISpec
from apispec.ext.marshmallow import MarshmallowPlugin, OpenAPIConverter
from apispec_webframeworks.flask import FlaskPlugin
from flask import Flask

import propcalc

from ._config import Limits
from ._endpoints import ENDPOINTS
from ._fields import openapi_attribute_function
from ._json import canonical_dumps
from ._network_schemas import network_components
from ._problems import TYPE_COMPUTATION, TYPE_INVALID_FIELDS, TYPE_WORK_BUDGET
from ._routes import BLUEPRINT
from ._schemas import Schemas

__all__ = ["build_openapi", "DESCRIPTION", "IMAGE_CONTENT"]

DESCRIPTION = """\
Mean-field signal propagation for deep random networks (propcalc): activation
properties and gains, propagation reports (fixed points, chi_1, depth scales,
phase), the edge-of-chaos line, per-layer initialisation plans, sampled
variance/correlation maps, dropout, maxout networks, mean-variance fixed
points (self-normalisation) and alpha dropout, Jacobian spectra and dynamical
isometry, the softmax output layer at initialisation, finite-width checks
on seeded random networks (POST /v1/simulate), networks described block by
block (POST /v1/network: q, c and the gradient at every position, a summary,
a plan), activations shaped for a target depth (POST /v1/shape), and images
(PNG or SVG) of the phase diagram, the variance and correlation maps, the
depth scales, a network's q, c and gradient and a shaping (/v1/plots/...).
Infinite-width predictions at initialisation: check them on your own model.

**Conventions.** Fan-in scaling W_ij ~ N(0, sigma_w2 / fan_in), b_i ~ N(0,
sigma_b2). JSON has no infinity: an infinite number (a depth scale exactly at
the edge of chaos, an unbounded output range) is the string "inf" or "-inf";
a quantity that does not exist (q* when the variance grows without bound) is
null. NaN never appears. Input numbers must be finite: the tokens NaN and
Infinity are refused (400), so are numbers that overflow a double.
Responses are canonical JSON (sorted keys, no spaces): the same request
always gives the same bytes, with an ETag; GET requests answer If-None-Match
with 304. Images are deterministic too (no dates or software tags in the
files); their type comes from the format member or the Accept header.

**Activations** are a built-in name ("tanh"), {"name": "leaky_relu",
"params": {"slope": 0.1}}, or {"formula": "x * sigmoid(beta * x)",
"params": {"beta": 1.5}}.

**Errors** are RFC 9457 problem details (application/problem+json). 422
responses list one entry per bad member, with a JSON pointer into the body
(or the query parameter name) and a message naming the constraint and the
value received. Problem types: about:blank (400, 404, 405 with an Allow
header, 406, 413, 415, 500, 501), {invalid} (422), {budget} (422, the cost of the
request exceeds WORK_BUDGET or WALL_CLOCK_LIMIT, or a simulation exceeds
MAX_SIMULATION_SIZE; "limit" names it) and
{computation} (422, the engine could not produce a trustworthy number for
these inputs, or the target cannot be met).
""".replace("{invalid}", TYPE_INVALID_FIELDS).replace("{budget}", TYPE_WORK_BUDGET).replace(
    "{computation}", TYPE_COMPUTATION)


class _Converter(OpenAPIConverter):
    """Schema descriptions from the class docstrings; unknown members always refused;
    a schema's ``OPENAPI_EXTRA`` (cross-member rules) merged in.

    (apispec drops ``additionalProperties`` when a schema has a Meta
    description, so descriptions are added here instead.)
    """

    def schema2jsonschema(self, schema: Any) -> dict[str, Any]:
        out = super().schema2jsonschema(schema)
        cls = schema if isinstance(schema, type) else type(schema)
        doc = (cls.__doc__ or "").strip().split("\n\n")[0].replace("\n", " ")
        if doc:
            out["description"] = " ".join(doc.split())
        out["additionalProperties"] = False
        # cross-member rules that JSON Schema can state ("exactly one of q, q_grid"...)
        out.update(getattr(cls, "OPENAPI_EXTRA", {}))
        return out


class _Plugin(MarshmallowPlugin):
    Converter = _Converter


_PROBLEM_TEXT = {
    304: "Not modified: the ETag given in If-None-Match is current.",
    400: "Malformed JSON, NaN/Infinity tokens, numbers that overflow, duplicate keys, or a "
         "body that is not a JSON object.",
    404: "No such resource (for activations: not a built-in name).",
    405: "Method not allowed; the Allow header lists the allowed ones.",
    413: "The body is larger than MAX_CONTENT_LENGTH.",
    406: "The Accept header allows none of the image types the operation answers (image/png, "
         "image/svg+xml), or not the one the format member asks for.",
    415: "Content-Type is not application/json.",
    422: "Invalid members (one entry per member, with a JSON pointer or parameter name), a "
         "request over the work budget, or a computation that could not produce a "
         "trustworthy result.",
    500: "Internal error (logged; quote the incident id).",
    503: "Busy: the expensive lane is full (Retry-After says when to retry), or the computation "
         "ran out of memory.",
    501: "The service cannot draw images where it runs: matplotlib (the 'plot' extra) is not "
         "installed.",
}

#: the 200 content of the image operations: binary bodies (OpenAPI 3.1, section 4.8.14.3)
IMAGE_CONTENT = {
    "image/png": {"schema": {"type": "string", "format": "binary",
                             "contentMediaType": "image/png"}},
    "image/svg+xml": {"schema": {"type": "string", "contentMediaType": "image/svg+xml"}},
}


def _headers(limit_cache: bool, image: bool = False) -> dict[str, Any]:
    out: dict[str, Any] = {
        "ETag": {"description": "strong entity tag of the body", "schema": {"type": "string"}},
    }
    if limit_cache:
        out["X-Propcalc-Cache"] = {"description": "hit or miss of the in-process result cache",
                                   "schema": {"type": "string", "enum": ["hit", "miss"]}}
    if image:
        out["Vary"] = {"description": "Accept: without a format member the Accept header "
                                      "chooses the image type", "schema": {"type": "string"}}
        out["Content-Disposition"] = {"description": "inline, with a file name such as "
                                                     "phase-diagram.png",
                                      "schema": {"type": "string"}}
    return out


def build_openapi(app: Flask, schemas: Schemas, limits: Limits) -> bytes:
    """The OpenAPI 3.1 document of ``app``, as canonical JSON bytes."""
    plugin = _Plugin()
    spec = APISpec(
        title="propcalc",
        version=propcalc.__version__,
        openapi_version="3.1.0",
        plugins=[FlaskPlugin(), plugin],
        info={"description": DESCRIPTION, "license": {"name": "MIT", "identifier": "MIT"}},
    )
    assert plugin.converter is not None
    plugin.converter.add_attribute_function(openapi_attribute_function)

    spec.components.schema("Problem", schema=schemas.Problem)
    for name, component in network_components().items():  # the description format
        spec.components.schema(name, component)
    for status, text in _PROBLEM_TEXT.items():
        if status == 304:
            spec.components.response("NotModified", {"description": text})
            continue
        response: dict[str, Any] = {
            "description": text,
            "content": {"application/problem+json": {"schema": "Problem"}},
        }
        if status == 405:
            response["headers"] = {"Allow": {"description": "the allowed methods",
                                             "schema": {"type": "string"}}}
        if status == 503:
            response["headers"] = {"Retry-After": {"description": "seconds to wait",
                                                   "schema": {"type": "string"}}}
        spec.components.response(f"Problem{status}", response)
    spec.components.parameter("IfNoneMatch", "header", {
        "name": "If-None-Match", "required": False, "schema": {"type": "string"},
        "description": "an ETag from an earlier response: 304 if it is still current"})

    ops_by_rule: dict[str, dict[str, Any]] = {}
    views: dict[str, Any] = {}
    for ep in ENDPOINTS:
        op: dict[str, Any] = {
            "operationId": ep.name,
            "summary": ep.summary,
            "description": ep.description,
            "tags": [ep.tag],
            "responses": {
                "200": {
                    "description": "OK",
                    "content": {"application/json": {"schema": getattr(schemas, ep.response)}},
                    "headers": _headers(ep.compute is not None) if ep.name != "health" else {},
                } if not ep.image else {
                    "description": "The image: PNG or SVG (see format and Accept)",
                    "content": IMAGE_CONTENT,
                    "headers": _headers(True, image=True),
                },
            },
        }
        for status in ep.statuses:
            op["responses"][str(status)] = "NotModified" if status == 304 else f"Problem{status}"
        op["responses"]["405"] = "Problem405"
        if ep.request is not None:
            op["requestBody"] = {"required": True, "content": {
                "application/json": {"schema": getattr(schemas, ep.request)}}}
        params: list[Any] = []
        if ep.query is not None:
            params.append({"in": "query", "schema": getattr(schemas, ep.query)})
        if ep.name == "activation_one":
            params.append({"in": "path", "name": "name", "required": True,
                           "schema": {"type": "string"},
                           "description": "a built-in activation name (404 otherwise)"})
        if ep.method == "GET" and 304 in ep.statuses:
            params.append("IfNoneMatch")
        if params:
            op["parameters"] = params
        ops_by_rule.setdefault(ep.rule, {})[ep.method.lower()] = op
        views[ep.rule] = app.view_functions[f"{BLUEPRINT}.{ep.name}"]
    for rule, ops in ops_by_rule.items():
        with app.test_request_context():
            spec.path(view=views[rule], app=app, operations=ops)
    openapi_op = {"get": {
        "operationId": "openapi", "summary": "This document", "tags": ["service"],
        "responses": {"200": {"description": "The OpenAPI 3.1 document",
                              "content": {"application/json": {"schema": {"type": "object"}}},
                              "headers": _headers(False)},
                      "304": "NotModified", "405": "Problem405", "500": "Problem500"},
        "parameters": ["IfNoneMatch"]}}
    with app.test_request_context():
        spec.path(view=app.view_functions[f"{BLUEPRINT}.openapi"], app=app, operations=openapi_op)
    doc = spec.to_dict()
    doc.setdefault("info", {})["x-limits"] = limits.to_dict()
    return (canonical_dumps(doc) + "\n").encode("ascii")
