"""Names as people type them (moved to :mod:`propcalc.names`, below the errors, so that every
error naming a choice can suggest the nearest one); kept here for existing imports."""

from __future__ import annotations

from ..names import canonical_name, did_you_mean, name_key, nearest_name

__all__ = ["name_key", "canonical_name", "nearest_name", "did_you_mean"]
