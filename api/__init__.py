"""propcalc's JSON HTTP service (import name ``propcalc_api``; the sources live in ``api/``).

>>> from propcalc_api import create_app
>>> app = create_app()            # nothing is created at import time

Endpoints under ``/v1`` (see ``/openapi.json`` and ``docs/service.md``):
activation list and profiles, propagation reports, the edge of chaos,
initialisation plans and sampled maps; dropout, maxout, mean-variance fixed
points and alpha dropout, Jacobian spectra and the isometry advice, the
softmax output layer, and finite-width simulations; PNG/SVG images of the
phase diagram, the variance and correlation maps and the depth scales
(``/v1/plots/...``, with the ``plot`` extra); ``/health``. Run it locally with
``propcalc serve``; in production with ``propcalc serve --production`` (gunicorn
with waitress workers: see ``docs/service.md``).
"""

from __future__ import annotations

from typing import Any

__all__ = ["create_app", "serve"]


def __getattr__(name: str) -> Any:
    # create_app on first use: importing propcalc_api (``propcalc serve`` is registered from
    # propcalc_api._command) must not import flask
    if name == "create_app":
        from ._app import create_app

        return create_app
    if name == "serve":
        from ._production import serve

        return serve
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
