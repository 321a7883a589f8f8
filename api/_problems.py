"""RFC 9457 problem details, and the one place where exceptions become HTTP responses.

Every error leaves the service as ``application/problem+json``::

    {"type": "tag:propcalc,2025:problem:invalid-fields", "title": "...",
     "status": 422, "detail": "...", "instance": "/v1/propagation",
     "errors": [{"pointer": "/sigma_w2", "detail": "must be in (0, 10000], got -1"}]}

Problem types (``type``; ``tag:`` URIs are identifiers, not links):

=====================================  ======  =================================================
type                                   status  when
=====================================  ======  =================================================
about:blank                            400     body is not JSON / not an object (``detail``)
about:blank                            404     no such path, or no such built-in activation
about:blank                            405     method not allowed (``Allow`` header lists them)
about:blank                            406     an image endpoint, and the Accept header allows
                                               neither image/png nor image/svg+xml (or not the
                                               ``format`` asked for)
about:blank                            413     body larger than MAX_CONTENT_LENGTH
about:blank                            415     Content-Type is not application/json
...:invalid-fields                     422     members fail validation (one entry per field)
...:work-budget-exceeded               422     the estimated cost or the wall-clock time of the
                                               request exceeds the limits, or a simulation
                                               exceeds MAX_SIMULATION_SIZE (``limit`` names it)
...:computation-failed                 422     the engine could not produce a trustworthy number
                                               for these inputs (ComputationError), or a
                                               shaping target cannot be met (ShapingError)
about:blank                            500     a bug: logged with a traceback under ``incident``
about:blank                            501     an image endpoint without matplotlib installed
=====================================  ======  =================================================

:func:`handle_exception` is registered for every exception; nothing else in
the service builds an error response.
"""

from __future__ import annotations

import logging
import re
import uuid
from collections.abc import Iterator, Mapping
from http import HTTPStatus
from typing import Any

import numpy as np
from flask import Response, current_app, g, request
from marshmallow import ValidationError
from werkzeug.exceptions import HTTPException

from propcalc import (
    ComputationError,
    FormulaError,
    InvalidParameterError,
    NetworkDescriptionError,
    PropcalcError,
    ShapingError,
    UnknownActivationError,
    nearest_name,
)

from ._json import JSONBodyError, canonical_dumps

__all__ = [
    "PROBLEM_MIMETYPE",
    "TYPE_INVALID_FIELDS",
    "TYPE_WORK_BUDGET",
    "TYPE_COMPUTATION",
    "Problem",
    "WorkBudgetExceeded",
    "ErrorContext",
    "handle_exception",
    "validation_entries",
    "json_pointer",
    "show_value",
]

PROBLEM_MIMETYPE = "application/problem+json"
_TAG = "tag:propcalc,2025:problem:"
TYPE_INVALID_FIELDS = _TAG + "invalid-fields"
TYPE_WORK_BUDGET = _TAG + "work-budget-exceeded"
TYPE_COMPUTATION = _TAG + "computation-failed"

_log = logging.getLogger("propcalc_api")


class Problem(Exception):
    """An error response to send (raised by views, answered by :func:`handle_exception`).

    Parameters
    ----------
    status : int
    detail : str
    type : str
        Problem type URI (``about:blank`` for plain HTTP errors).
    title : str, optional
        Defaults to the HTTP reason phrase for ``about:blank``.
    errors : list of dict, optional
        One ``{"pointer" | "parameter": ..., "detail": ...}`` per bad field.
    extra : mapping, optional
        Extension members (``limit``, ``estimated_cost``).
    headers : mapping, optional
    """

    def __init__(self, status: int, detail: str, *, type: str = "about:blank",
                 title: str | None = None, errors: list[dict[str, str]] | None = None,
                 extra: Mapping[str, Any] | None = None,
                 headers: Mapping[str, str] | None = None) -> None:
        super().__init__(detail)
        self.status = status
        self.detail = detail
        self.type = type
        self.title = title or HTTPStatus(status).phrase
        self.errors = errors
        self.extra = dict(extra or {})
        self.headers = dict(headers or {})

    def body(self) -> dict[str, Any]:
        """The problem object."""
        out: dict[str, Any] = {"type": self.type, "title": self.title, "status": self.status,
                               "detail": self.detail, "instance": request.path}
        if self.errors is not None:
            out["errors"] = self.errors
        out.update(self.extra)
        return out


class WorkBudgetExceeded(Problem):
    """A request refused (or stopped) because of its cost."""

    def __init__(self, detail: str, limit_name: str, limit_value: float,
                 estimate: float | None = None, pointer: str | None = None,
                 entry: str | None = None) -> None:
        extra: dict[str, Any] = {"limit": {"name": limit_name, "value": limit_value}}
        if estimate is not None:
            extra["estimated_cost"] = round(float(estimate), 1)
        errors = ([{"pointer": pointer, "detail": entry or detail}] if pointer is not None
                  else None)
        super().__init__(422, detail, type=TYPE_WORK_BUDGET,
                         title="The request needs more work than one request may take",
                         errors=errors, extra=extra)


class ErrorContext:
    """What the handler needs to point engine errors at request members.

    Set on ``flask.g.error_context`` by the view once the body has been parsed.

    Attributes
    ----------
    fields : set of str
        Top-level members of the request schema.
    raw : Any
        The parsed body (or the query arguments), to quote received values.
    activation_pointer : str
        Where the activation was given ("/activation", "/activation/name" or
        "/activation/formula").
    query : bool
        True for a GET form: entries carry ``parameter`` instead of ``pointer``.
    """

    def __init__(self, fields: set[str], raw: Any, query: bool = False) -> None:
        self.fields = fields
        self.raw = raw
        self.query = query
        act = raw.get("activation") if isinstance(raw, dict) else None
        if isinstance(act, dict):
            self.activation_pointer = ("/activation/formula" if "formula" in act
                                       else "/activation/name")
        else:
            self.activation_pointer = "/activation"

    def entry(self, pointer: str, detail: str) -> dict[str, str]:
        """A problem entry, as a pointer or (GET forms) a parameter name."""
        if self.query:
            return {"parameter": pointer.lstrip("/").split("/")[0], "detail": detail}
        return {"pointer": pointer, "detail": detail}


# ---------------------------------------------------------------------------------------------
# marshmallow errors -> entries
# ---------------------------------------------------------------------------------------------
def json_pointer(parts: list[str | int]) -> str:
    """RFC 6901: '/a/0/b', with '~' and '/' escaped."""
    return "".join("/" + str(p).replace("~", "~0").replace("/", "~1") for p in parts)


_MISSING = object()


def _lookup(raw: Any, parts: list[str | int]) -> Any:
    cur = raw
    for p in parts:
        if isinstance(cur, dict) and p in cur:
            cur = cur[p]
        elif isinstance(cur, list) and isinstance(p, int) and 0 <= p < len(cur):
            cur = cur[p]
        else:
            return _MISSING
    return cur


def show_value(value: Any, limit: int = 60) -> str:
    """A received value as short JSON text ('a list of 2500 items' for long arrays)."""
    if isinstance(value, list) and len(value) > 8:
        return f"a list of {len(value)} items"
    if isinstance(value, dict) and len(value) > 8:
        return f"an object with {len(value)} members"
    try:
        text = canonical_dumps(value)
    except (TypeError, ValueError):
        text = repr(value)
    return text if len(text) <= limit else text[: limit - 3] + "..."


def _walk(messages: Any, parts: list[str | int]) -> Iterator[tuple[list[str | int], str]]:
    if isinstance(messages, Mapping):
        keys = set(messages)
        if keys and keys <= {"key", "value"} and parts:
            # errors of a Dict field's key or value: point at the member
            for k in ("key", "value"):
                if k in messages:
                    yield from _walk(messages[k], parts)
            return
        for key, sub in messages.items():
            if key == "_schema":
                yield from _walk(sub, parts)
            else:
                yield from _walk(sub, [*parts, key])
    elif isinstance(messages, list):
        if all(isinstance(m, str) for m in messages):
            for m in messages:
                yield parts, m
        else:
            for m in messages:
                yield from _walk(m, parts)
    else:
        yield parts, str(messages)


#: the list of allowed members in the message for an unknown one (StrictSchema)
_ALLOWED = re.compile(r"^is not a field here \(allowed: (.*)\)$")

#: marshmallow's own messages (fields without custom ones), in the service's words
_PLAIN = {
    "Missing data for required field.": "is required",
    "Field may not be null.": "must not be null",
    "Not a valid list.": "must be an array",
    "Not a valid mapping type.": "must be an object",
    "Invalid input type.": "must be an object",
    "Unknown field.": "is not a field here",
}


def validation_entries(err: ValidationError, ctx: ErrorContext) -> list[dict[str, str]]:
    """One entry per bad member; the received value is appended to each message."""
    out = []
    seen = set()
    for parts, msg in _walk(err.messages, []):
        msg = _PLAIN.get(msg, msg)
        pointer = json_pointer(parts)
        value = _lookup(ctx.raw, parts)
        if value is not _MISSING and not msg.startswith("is not a "):
            msg = f"{msg}, got {show_value(value)}"
        allowed = _ALLOWED.search(msg)
        if allowed is not None and parts and isinstance(parts[-1], str):
            close = nearest_name(parts[-1], allowed.group(1).split(", "))
            if close is not None:  # "sigma_w" -> did you mean sigma_w2?
                msg = f"{msg}; did you mean {close}?"
        if (pointer, msg) in seen:
            continue
        seen.add((pointer, msg))
        out.append(ctx.entry(pointer, msg))
    out.sort(key=lambda e: (e.get("pointer", e.get("parameter", "")), e["detail"]))
    return out


def _invalid(entries: list[dict[str, str]]) -> Problem:
    n = len(entries)
    return Problem(422, f"{n} member{'s' * (n != 1)} of the request {'are' if n != 1 else 'is'} "
                   "invalid: see errors", type=TYPE_INVALID_FIELDS,
                   title="The request has invalid members", errors=entries)


# ---------------------------------------------------------------------------------------------
# engine errors -> entries
# ---------------------------------------------------------------------------------------------
def _engine_pointer(field: str, ctx: ErrorContext) -> str:
    """The engine spells fields 'sigma_w2', 'widths[3]', 'params.slope': make a pointer."""
    parts: list[str | int] = []
    for chunk in field.replace("]", "").replace("[", ".").split("."):
        if chunk == "":
            continue
        parts.append(int(chunk) if chunk.isdigit() else chunk)
    if not parts:
        return ""
    if parts[0] == "params":
        return "/activation" + json_pointer(parts)
    if parts[0] in ctx.fields:
        return json_pointer(parts)
    return ""


def _engine_problem(exc: Exception, ctx: ErrorContext | None) -> Problem:
    ctx = ctx or ErrorContext(set(), None)
    if isinstance(exc, NetworkDescriptionError) and "network" in ctx.fields:
        # the engine names the JSON pointer within the description: prefix the member
        text = str(exc)
        detail = text[len(exc.field) + 1:] if text.startswith(exc.field + " ") else text
        return _invalid([ctx.entry("/network" + exc.path, detail)])
    if isinstance(exc, InvalidParameterError):
        pointer = _engine_pointer(exc.field, ctx)
        if pointer == "" and exc.field not in ("", None):
            _log.warning("engine refused a parameter the request does not have: %s", exc)
        detail = str(exc)
        short = f"must be {exc.constraint}, got {show_value(_jsonish(exc.value))}"
        if getattr(exc, "hint", ""):  # "did you mean slope?", what to give instead
            short += f"; {exc.hint}"
        return _invalid([ctx.entry(pointer, short if pointer else detail)])
    if isinstance(exc, FormulaError):
        text = str(exc)
        column = getattr(exc, "column", None)
        if column and "column" not in text:
            text += f" (column {column})"
        return _invalid([ctx.entry(ctx.activation_pointer, text)])
    if isinstance(exc, UnknownActivationError):
        return _invalid([ctx.entry(ctx.activation_pointer, str(exc))])
    assert isinstance(exc, ComputationError)
    return Problem(422, str(exc), type=TYPE_COMPUTATION,
                   title="The computation could not produce a trustworthy result")


def _jsonish(value: Any) -> Any:
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, np.generic):
        return value.item()
    return value


# ---------------------------------------------------------------------------------------------
# the handler
# ---------------------------------------------------------------------------------------------
def _as_problem(exc: BaseException) -> Problem:
    ctx: ErrorContext | None = g.get("error_context")
    if isinstance(exc, Problem):
        return exc
    if isinstance(exc, ValidationError):
        return _invalid(validation_entries(exc, ctx or ErrorContext(set(), None)))
    if isinstance(exc, (InvalidParameterError, FormulaError, UnknownActivationError,
                        ComputationError)):
        return _engine_problem(exc, ctx)
    if isinstance(exc, ShapingError):
        return Problem(422, str(exc), type=TYPE_COMPUTATION, title="The target cannot be met")
    if isinstance(exc, PropcalcError):  # any other refusal of the engine: never a 500
        return Problem(422, str(exc), type=TYPE_COMPUTATION,
                       title="The computation could not produce a trustworthy result")
    if isinstance(exc, JSONBodyError):
        return Problem(400, str(exc))
    if isinstance(exc, HTTPException) and exc.code is not None:
        headers = {k: v for k, v in exc.get_headers() if k.lower() != "content-type"}
        detail = {
            404: f"no resource at {request.path}; see /openapi.json for the paths",
            405: f"{request.method} is not allowed on {request.path}",
            413: (f"the request body is larger than {current_app.config['MAX_CONTENT_LENGTH']} "
                  "bytes (limit MAX_CONTENT_LENGTH)"),
        }.get(exc.code, exc.description or HTTPStatus(exc.code).phrase)
        extra = {}
        if exc.code == 413:
            extra["limit"] = {"name": "MAX_CONTENT_LENGTH",
                              "value": current_app.config["MAX_CONTENT_LENGTH"]}
        return Problem(exc.code, detail, headers=headers, extra=extra)
    incident = uuid.uuid4().hex[:16]
    _log.error("internal error %s on %s %s", incident, request.method, request.path,
               exc_info=(type(exc), exc, exc.__traceback__))
    return Problem(500, "internal error: it has been logged; quote the incident id if you "
                   "report it", extra={"incident": incident})


def handle_exception(exc: Exception) -> Response:
    """Flask error handler for every exception: the problem-details response."""
    problem = _as_problem(exc)
    body = canonical_dumps(problem.body()) + "\n"
    resp = Response(body, status=problem.status, mimetype=PROBLEM_MIMETYPE)
    for key, value in problem.headers.items():
        resp.headers[key] = value
    resp.headers["Cache-Control"] = "no-store"
    return resp
