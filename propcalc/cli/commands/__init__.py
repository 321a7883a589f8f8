"""The built-in subcommands of ``propcalc``, one module per family (see propcalc.cli.program)."""
