"""The ``propcalc`` command."""

from .command import build_parser, format_number, main

__all__ = ["build_parser", "format_number", "main"]
