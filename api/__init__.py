"""propcalc's JSON HTTP service (import name ``propcalc_api``). Under construction."""

__all__: list[str] = []
