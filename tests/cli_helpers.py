"""Helpers shared by the CLI test modules: run the command in-process, parse strict JSON."""

from __future__ import annotations

import io
import json

from propcalc import cli

__all__ = ["run", "strict_json"]


def _no_constants(token: str):
    raise AssertionError(f"non-standard JSON token {token!r} in the output")


def strict_json(text: str):
    """json.loads that refuses NaN, Infinity and -Infinity."""
    return json.loads(text, parse_constant=_no_constants)


def run(*argv: str) -> tuple[int, str, str]:
    """propcalc.cli.main(argv) -> (exit status, stdout text, stderr text)."""
    out, err = io.StringIO(), io.StringIO()
    code = cli.main(list(argv), out=out, err=err)
    return code, out.getvalue(), err.getvalue()
